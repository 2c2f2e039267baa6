/*
 * The serial cable between the simulated board and the host: a pseudo-terminal whose slave
 * side is linked at a fixed path (like /dev/serial/by-id/...), plus the line itself, timed
 * byte by byte in simulated cycles, with optional corruption of whole lines for tests.
 */
#ifndef CABLE_H
#define CABLE_H

#include <stdint.h>

#define CABLE_QUEUE 8192u /* bytes in flight each way; a power of two */

typedef struct {
    uint64_t due[CABLE_QUEUE]; /* cycle at which the byte has fully crossed the line */
    uint8_t byte[CABLE_QUEUE];
    uint32_t head, tail;        /* tail: next to deliver */
    uint64_t free_at;           /* cycle the line is free for the next byte */
    uint32_t every;             /* corrupt one byte in 1 of `every` lines (0: never) */
    uint8_t chosen;             /* the current line is one of them */
    uint32_t line_no, pos;      /* line count and position within the current line */
    uint32_t corrupted, lines;  /* lines corrupted, lines carried */
    uint32_t dropped;           /* bytes lost: queue full, or nobody on the other end */
    uint32_t noise_state;       /* xorshift state for the replacement byte */
    uint8_t at_start;           /* hand bytes over when they start (the UART model adds
                                   the frame time itself), not when they end */
} cable_line;

typedef struct {
    const char *link;   /* where the slave side is linked */
    int master, slave;  /* -1 when unplugged */
    cable_line to_board, to_host;
} cable;

int cable_plug(cable *c);       /* 0 ok, -1 with errno */
void cable_unplug(cable *c);

/* Queue one byte on a line at cycle `now`; `byte_cycles` is one frame on the wire. Returns
 * 1 when the byte is the end of a line (LF). Corrupts it first when its line is chosen: each
 * line with odds 1 in `every`, drawn (not every n-th, which can fall in step with a resend
 * period and damage the same command every time). */
int cable_send(cable_line *l, uint8_t byte, uint64_t now, uint64_t byte_cycles, int *corrupted);

/* The next byte whose time has come (due <= now), or -1. */
int cable_take(cable_line *l, uint64_t now);
uint64_t cable_next_due(const cable_line *l); /* UINT64_MAX when empty */

#endif
