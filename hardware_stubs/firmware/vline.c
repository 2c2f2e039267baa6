/* Vigil reference firmware: writing and reading the text of wire lines. See vline.h. */
#include "vline.h"

#include <string.h>

static const uint32_t powers_of_ten[10] VP_FLASH = {
    1000000000UL, 100000000UL, 10000000UL, 1000000UL, 100000UL,
    10000UL, 1000UL, 100UL, 10UL, 1UL};

/* CRC-16/CCITT-FALSE when started from 0xFFFF: poly 0x1021, MSB first, no final xor
 * (the CRC catalogue's check value for "123456789" is 0x29B1). */
uint16_t vp_crc16(uint16_t crc, const uint8_t *data, uint16_t len) {
    while (len--) {
        crc ^= (uint16_t)(*data++) << 8;
        for (uint8_t bit = 0; bit < 8; bit++)
            crc = (crc & 0x8000u) ? (uint16_t)((crc << 1) ^ 0x1021u) : (uint16_t)(crc << 1);
    }
    return crc;
}

void vl_byte(vl_writer *w, uint8_t c) {
    w->crc = vp_crc16(w->crc, &c, 1);
    w->put(c);
    w->len++;
}

void vl_space(vl_writer *w) { vl_byte(w, ' '); }

/* Decimal by repeated subtraction: far cheaper than 32-bit division on an 8-bit core. */
void vl_u32(vl_writer *w, uint32_t v) {
    uint8_t started = 0;
    for (uint8_t i = 0; i < 10; i++) {
        uint32_t p = VP_FLASH_DWORD(&powers_of_ten[i]);
        uint8_t digit = 0;
        while (v >= p) {
            v -= p;
            digit++;
        }
        if (digit || started || i == 9) {
            vl_byte(w, (uint8_t)('0' + digit));
            started = 1;
        }
    }
}

void vl_field_u32(vl_writer *w, uint32_t v) {
    vl_space(w);
    vl_u32(w, v);
}

void vl_field_flash(vl_writer *w, const char *s) {
    uint8_t c;
    vl_space(w);
    while ((c = VP_FLASH_BYTE(s++)) != 0) vl_byte(w, c);
}

/* Every line starts with its sequence field and verb. */
void vl_start(vl_writer *w, vp_put_fn put, uint32_t seq, const char *verb) {
    w->put = put;
    w->crc = 0xFFFFu;
    w->len = 0;
    vl_u32(w, seq);
    vl_space(w);
    while (*verb) vl_byte(w, (uint8_t)*verb++);
}

uint8_t vl_finish(vl_writer *w) {
    static const char hex[] = "0123456789ABCDEF";
    uint16_t crc = w->crc;
    w->put(' ');
    for (int8_t shift = 12; shift >= 0; shift -= 4) w->put((uint8_t)hex[(crc >> shift) & 0xF]);
    w->put('\n');
    return (uint8_t)(w->len + 6);
}

/* Strict decimal: digits only, no leading zero, at most 2^32 - 1. */
uint8_t vl_parse_u32(const char *s, uint8_t len, uint32_t *out) {
    if (len == 0 || len > 10 || (s[0] == '0' && len > 1)) return 0;
    uint32_t v = 0;
    for (uint8_t i = 0; i < len; i++) {
        uint8_t digit = (uint8_t)(s[i] - '0');
        if (digit > 9) return 0;
        if (v > 429496729UL || (v == 429496729UL && digit > 5)) return 0;
        v = v * 10 + digit;
    }
    *out = v;
    return 1;
}

uint8_t vl_is_word(const char *s, uint8_t len, const char *word) {
    return strlen(word) == len && memcmp(s, word, len) == 0;
}

uint8_t vl_hex_digit(char c) {
    if (c >= '0' && c <= '9') return (uint8_t)(c - '0');
    if (c >= 'A' && c <= 'F') return (uint8_t)(c - 'A' + 10);
    return 0xFF;
}
