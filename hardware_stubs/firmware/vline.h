/*
 * Vigil reference firmware: the text level of a wire line (hardware_stubs/PROTOCOL.md s1-2).
 * Writing fields with a running CRC-16/CCITT-FALSE, and strict reading of numbers. Pure C99.
 */
#ifndef VLINE_H
#define VLINE_H

#include <stdint.h>

#ifdef __AVR__
#include <avr/pgmspace.h>
#define VP_FLASH PROGMEM
#define VP_FLASH_BYTE(p) pgm_read_byte(p)
#define VP_FLASH_WORD(p) pgm_read_word(p)
#define VP_FLASH_DWORD(p) pgm_read_dword(p)
#else
#define VP_FLASH
#define VP_FLASH_BYTE(p) (*(const uint8_t *)(p))
#define VP_FLASH_WORD(p) (*(const uint16_t *)(p))
#define VP_FLASH_DWORD(p) (*(const uint32_t *)(p))
#endif

typedef void (*vp_put_fn)(uint8_t byte);

/* A line being written: bytes go straight to `put`, the CRC of the body is kept on the way. */
typedef struct {
    vp_put_fn put;
    uint16_t crc;
    uint8_t len;
} vl_writer;

uint16_t vp_crc16(uint16_t crc, const uint8_t *data, uint16_t len);

void vl_start(vl_writer *w, vp_put_fn put, uint32_t seq, const char *verb);
void vl_byte(vl_writer *w, uint8_t c);
void vl_u32(vl_writer *w, uint32_t v);
void vl_field_u32(vl_writer *w, uint32_t v);    /* " <v>" */
void vl_field_flash(vl_writer *w, const char *s); /* " <s>", s in flash (VP_FLASH) */
void vl_space(vl_writer *w);
uint8_t vl_finish(vl_writer *w); /* " XXXX\n"; returns the line's length */

uint8_t vl_parse_u32(const char *s, uint8_t len, uint32_t *out); /* 0 when not strict decimal */
uint8_t vl_is_word(const char *s, uint8_t len, const char *word);
uint8_t vl_hex_digit(char c); /* 0xFF unless 0-9 or A-F */

#endif
