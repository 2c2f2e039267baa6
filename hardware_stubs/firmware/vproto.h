/*
 * Vigil reference firmware: the protocol core (hardware_stubs/PROTOCOL.md, version 1).
 *
 * Pure C99: no registers, no interrupts, no clock of its own. The board layer (main_avr.c)
 * or the host harness (host_sim.c) passes the time in, feeds received bytes and input
 * levels, drives outputs through a callback and writes the lines it is handed. So the same
 * file builds for the ATmega328P and for the host, where the tests cross-check it against
 * the Python codec.
 */
#ifndef VPROTO_H
#define VPROTO_H

#include <stdint.h>

#include "boxes.h"
#include "vline.h"

#define VP_PROTOCOL_VERSION 1
#define VP_FIRMWARE_ID BOX_FIRMWARE_ID /* names the box it was built for (boxes.h) */

#define VP_RING 128u           /* events held for replay; a power of two */
#define VP_RX_MAX 40u          /* receive buffer; no valid host line is longer than 33 */
#define VP_LINE_MAX 160u       /* longest line this device writes, LF included */
#define VP_MEMORY 16u          /* set/pulse commands remembered for idempotence */
#define VP_ACK_QUEUE 4u        /* acks waiting to be written */
#define VP_MAX_INPUTS 8u
#define VP_MAX_OUTPUTS 12u

#define VP_DEBOUNCE_US 2000UL      /* a level must hold this long to count */
#define VP_BEAT_US 1000000UL       /* heartbeat period */
#define VP_HOST_SILENCE_US 5000000UL /* no valid host line this long: outputs off */

enum vp_result { VP_OK = 0, VP_LOST, VP_NO_CHANNEL, VP_BAD_VALUE };

/* Channel n (1-based) of each direction has the two-letter kind code at index n - 1. */
typedef struct {
    uint8_t n_inputs;
    uint8_t n_outputs;
    const char (*input_codes)[3];  /* may live in flash (VP_FLASH) */
    const char (*output_codes)[3];
} vp_channel_map;

typedef void (*vp_output_fn)(uint8_t channel, uint8_t on);
/* The device clock read at the instant it is called (microseconds, mod 2^32). */
typedef uint32_t (*vp_clock_fn)(void);

typedef struct {
    uint32_t t_us;
    uint8_t channel_edge; /* channel in bits 0-6, bit 7 set for a rising edge */
} vp_event;

typedef struct {
    uint32_t first_us;  /* first raw change of the pending run: the edge's time */
    uint32_t last_us;   /* latest raw change: the level must hold from here */
    uint8_t stable;     /* debounced level, 1 = active (pressed, beam broken) */
    uint8_t pending;
} vp_debounce;

typedef struct {
    uint32_t id;
    uint16_t crc;
    uint8_t result;
} vp_memo;

typedef struct {
    uint32_t id;
    uint32_t value;
    uint8_t result;
    uint8_t before; /* line the ack follows: 0 none, 'i' identity, 'b' beat */
} vp_pending_ack;

typedef struct {
    const vp_channel_map *map;
    vp_output_fn set_output;
    vp_clock_fn clock;
    uint16_t boot;

    vp_event ring[VP_RING];
    uint32_t last_seq; /* newest event number, 0 before the first */
    uint32_t cursor;   /* next event number to write */

    vp_memo memo[VP_MEMORY];
    uint8_t memo_next;
    vp_pending_ack acks[VP_ACK_QUEUE];
    uint8_t ack_head, ack_count;
    uint8_t want_identity;

    uint32_t beat_due_us;
    uint32_t host_seen_us;
    uint8_t host_silent; /* outputs already in the safe state for want of a host */

    uint16_t outputs_on;  /* bit n - 1 for output n */
    uint16_t pulsing;
    uint32_t pulse_end_us[VP_MAX_OUTPUTS];

    char rx[VP_RX_MAX];
    uint8_t rx_len;
    uint8_t rx_overlong;
    uint32_t rx_rejected;

    vp_debounce inputs[VP_MAX_INPUTS];
    uint8_t stable_levels; /* bit i: inputs[i].stable */
    uint8_t pending_mask;  /* bit i: inputs[i].pending */
} vp_device;

/* `clock` times pulses from the instant their output turns on: the `now_us` handed to
 * vp_receive was read before the line was checked and parsed, which takes a while. */
void vp_init(vp_device *d, const vp_channel_map *map, vp_output_fn set_output,
             vp_clock_fn clock, uint16_t boot, uint8_t input_levels, uint32_t now_us);

/* Receiving: feed bytes only while vp_can_receive() (the ack queue has room). */
uint8_t vp_can_receive(const vp_device *d);
void vp_receive(vp_device *d, uint8_t byte, uint32_t now_us);

/* Inputs: report every raw change (from a pin-change interrupt), then poll the levels. */
void vp_input_changed(vp_device *d, uint8_t index, uint32_t when_us);
void vp_poll_inputs(vp_device *d, uint8_t levels, uint32_t now_us);
void vp_add_event(vp_device *d, uint8_t channel, uint8_t rising, uint32_t t_us);

/* Timing on the device: pulse ends, heartbeat, host silence. */
void vp_tick(vp_device *d, uint32_t now_us);
/* Pulse ends only: cheap, and safe to call from inside vp_write_next's `put` or between
 * received bytes, so that a long line does not hold a pulse on past its end. */
void vp_end_pulses(vp_device *d, uint32_t now_us);

/* Writes the next line through `put`, if any is due; returns its length (0: nothing).
 * Call it only with room for VP_LINE_MAX bytes. */
uint8_t vp_write_next(vp_device *d, uint32_t now_us, vp_put_fn put);

#endif
