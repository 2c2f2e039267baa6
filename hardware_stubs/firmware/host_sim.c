/*
 * Host build of the protocol core, for tests: a box with no hardware, driven by stdin.
 *
 * Each stdin line is either a directive or bytes for the device:
 *   @time US       set the device clock to US (mod 2^32), then run one loop pass
 *   @wait US       let US microseconds pass, running the loop every 100 us
 *   @in CH LEVEL   input CH (1-based) goes to LEVEL (1 active, 0 idle) now
 *   @boot N        restart the device with boot id N
 *   anything else  received by the device as it is, LF included
 * Stdout carries the device's lines exactly as it writes them, plus "@out CH ON US" when it
 * drives an output. The loop pass is the one main_avr.c runs: poll, tick, write.
 */
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include "channels.h"
#include "vproto.h"

static vp_device box;
static uint32_t now_us;
static uint8_t levels;

static void put(uint8_t byte) { putchar(byte); }

static uint32_t clock_now(void) { return now_us; }

static void set_output(uint8_t channel, uint8_t on) {
    printf("@out %u %u %lu\n", channel, on, (unsigned long)now_us);
}

static void loop_pass(void) {
    vp_poll_inputs(&box, levels, now_us);
    vp_tick(&box, now_us);
    while (vp_write_next(&box, now_us, put)) {
    }
}

static void wait_us(unsigned long long span) {
    while (span) {
        unsigned long long step = span < 100 ? span : 100;
        now_us += (uint32_t)step;
        span -= step;
        loop_pass();
    }
}

int main(void) {
    char *line = NULL;
    size_t cap = 0;
    ssize_t len;
    vp_init(&box, &box_channels, set_output, clock_now, 1, 0, now_us);
    loop_pass();
    while ((len = getline(&line, &cap, stdin)) > 0) {
        if (line[0] == '@') {
            unsigned long long a = 0, b = 0;
            if (sscanf(line, "@time %llu", &a) == 1) {
                now_us = (uint32_t)a;
                loop_pass();
            } else if (sscanf(line, "@wait %llu", &a) == 1) {
                wait_us(a);
            } else if (sscanf(line, "@in %llu %llu", &a, &b) == 2 && a >= 1 && a <= BOX_INPUTS) {
                uint8_t bit = (uint8_t)(1u << (a - 1));
                levels = b ? (uint8_t)(levels | bit) : (uint8_t)(levels & ~bit);
                vp_input_changed(&box, (uint8_t)(a - 1), now_us);
                loop_pass();
            } else if (sscanf(line, "@boot %llu", &a) == 1) {
                vp_init(&box, &box_channels, set_output, clock_now, (uint16_t)a, levels, now_us);
                loop_pass();
            } else {
                fprintf(stderr, "host_sim: unknown directive: %s", line);
                return 2;
            }
            continue;
        }
        for (ssize_t i = 0; i < len; i++) {
            while (!vp_can_receive(&box)) loop_pass();
            vp_receive(&box, (uint8_t)line[i], now_us);
        }
        loop_pass();
    }
    free(line);
    return 0;
}
