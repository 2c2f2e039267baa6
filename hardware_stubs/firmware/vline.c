/* Vigil reference firmware: writing and reading the text of wire lines. See vline.h. */
#include "vline.h"

#include <string.h>

static const uint32_t powers_of_ten[10] VP_FLASH = {
    1000000000UL, 100000000UL, 10000000UL, 1000000UL, 100000UL,
    10000UL, 1000UL, 100UL, 10UL, 1UL};

/* CRC-16/CCITT-FALSE when started from 0xFFFF: poly 0x1021, MSB first, no final xor
 * (the CRC catalogue's check value for "123456789" is 0x29B1). One table step per byte:
 * bit by bit it cost about 120 cycles a byte on the AVR, which made every line received or
 * written hold up the main loop (and so pulse ends) for hundreds of microseconds. The table
 * is crc_table[n] = the bitwise CRC of the byte n << 8 with the same polynomial. */
static const uint16_t crc_table[256] VP_FLASH = {
    0x0000, 0x1021, 0x2042, 0x3063, 0x4084, 0x50A5, 0x60C6, 0x70E7,
    0x8108, 0x9129, 0xA14A, 0xB16B, 0xC18C, 0xD1AD, 0xE1CE, 0xF1EF,
    0x1231, 0x0210, 0x3273, 0x2252, 0x52B5, 0x4294, 0x72F7, 0x62D6,
    0x9339, 0x8318, 0xB37B, 0xA35A, 0xD3BD, 0xC39C, 0xF3FF, 0xE3DE,
    0x2462, 0x3443, 0x0420, 0x1401, 0x64E6, 0x74C7, 0x44A4, 0x5485,
    0xA56A, 0xB54B, 0x8528, 0x9509, 0xE5EE, 0xF5CF, 0xC5AC, 0xD58D,
    0x3653, 0x2672, 0x1611, 0x0630, 0x76D7, 0x66F6, 0x5695, 0x46B4,
    0xB75B, 0xA77A, 0x9719, 0x8738, 0xF7DF, 0xE7FE, 0xD79D, 0xC7BC,
    0x48C4, 0x58E5, 0x6886, 0x78A7, 0x0840, 0x1861, 0x2802, 0x3823,
    0xC9CC, 0xD9ED, 0xE98E, 0xF9AF, 0x8948, 0x9969, 0xA90A, 0xB92B,
    0x5AF5, 0x4AD4, 0x7AB7, 0x6A96, 0x1A71, 0x0A50, 0x3A33, 0x2A12,
    0xDBFD, 0xCBDC, 0xFBBF, 0xEB9E, 0x9B79, 0x8B58, 0xBB3B, 0xAB1A,
    0x6CA6, 0x7C87, 0x4CE4, 0x5CC5, 0x2C22, 0x3C03, 0x0C60, 0x1C41,
    0xEDAE, 0xFD8F, 0xCDEC, 0xDDCD, 0xAD2A, 0xBD0B, 0x8D68, 0x9D49,
    0x7E97, 0x6EB6, 0x5ED5, 0x4EF4, 0x3E13, 0x2E32, 0x1E51, 0x0E70,
    0xFF9F, 0xEFBE, 0xDFDD, 0xCFFC, 0xBF1B, 0xAF3A, 0x9F59, 0x8F78,
    0x9188, 0x81A9, 0xB1CA, 0xA1EB, 0xD10C, 0xC12D, 0xF14E, 0xE16F,
    0x1080, 0x00A1, 0x30C2, 0x20E3, 0x5004, 0x4025, 0x7046, 0x6067,
    0x83B9, 0x9398, 0xA3FB, 0xB3DA, 0xC33D, 0xD31C, 0xE37F, 0xF35E,
    0x02B1, 0x1290, 0x22F3, 0x32D2, 0x4235, 0x5214, 0x6277, 0x7256,
    0xB5EA, 0xA5CB, 0x95A8, 0x8589, 0xF56E, 0xE54F, 0xD52C, 0xC50D,
    0x34E2, 0x24C3, 0x14A0, 0x0481, 0x7466, 0x6447, 0x5424, 0x4405,
    0xA7DB, 0xB7FA, 0x8799, 0x97B8, 0xE75F, 0xF77E, 0xC71D, 0xD73C,
    0x26D3, 0x36F2, 0x0691, 0x16B0, 0x6657, 0x7676, 0x4615, 0x5634,
    0xD94C, 0xC96D, 0xF90E, 0xE92F, 0x99C8, 0x89E9, 0xB98A, 0xA9AB,
    0x5844, 0x4865, 0x7806, 0x6827, 0x18C0, 0x08E1, 0x3882, 0x28A3,
    0xCB7D, 0xDB5C, 0xEB3F, 0xFB1E, 0x8BF9, 0x9BD8, 0xABBB, 0xBB9A,
    0x4A75, 0x5A54, 0x6A37, 0x7A16, 0x0AF1, 0x1AD0, 0x2AB3, 0x3A92,
    0xFD2E, 0xED0F, 0xDD6C, 0xCD4D, 0xBDAA, 0xAD8B, 0x9DE8, 0x8DC9,
    0x7C26, 0x6C07, 0x5C64, 0x4C45, 0x3CA2, 0x2C83, 0x1CE0, 0x0CC1,
    0xEF1F, 0xFF3E, 0xCF5D, 0xDF7C, 0xAF9B, 0xBFBA, 0x8FD9, 0x9FF8,
    0x6E17, 0x7E36, 0x4E55, 0x5E74, 0x2E93, 0x3EB2, 0x0ED1, 0x1EF0,
};

uint16_t vp_crc16(uint16_t crc, const uint8_t *data, uint16_t len) {
    while (len--) {
        uint8_t index = (uint8_t)((crc >> 8) ^ *data++);
        crc = (uint16_t)((crc << 8) ^ VP_FLASH_WORD(&crc_table[index]));
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
