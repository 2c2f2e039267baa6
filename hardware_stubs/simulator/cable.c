/* The pty cable and the timed line; see cable.h. */
#define _GNU_SOURCE
#include "cable.h"

#include <errno.h>
#include <fcntl.h>
#include <pty.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <termios.h>
#include <unistd.h>

int cable_plug(cable *c) {
    int master, slave;
    char name[256], temp[4096];
    if (c->master >= 0) return 0;
    if (openpty(&master, &slave, name, NULL, NULL) < 0) return -1;
    struct termios raw;
    if (tcgetattr(slave, &raw) == 0) { /* no echo, no line editing: bytes pass as they are */
        cfmakeraw(&raw);
        tcsetattr(slave, TCSANOW, &raw);
    }
    fcntl(master, F_SETFL, fcntl(master, F_GETFL) | O_NONBLOCK);
    fcntl(master, F_SETFD, FD_CLOEXEC);
    fcntl(slave, F_SETFD, FD_CLOEXEC);
    /* Link atomically, so a host polling the path never sees a half-made link. */
    snprintf(temp, sizeof temp, "%s.new", c->link);
    unlink(temp);
    if (symlink(name, temp) < 0 || rename(temp, c->link) < 0) {
        int saved = errno;
        close(master);
        close(slave);
        errno = saved;
        return -1;
    }
    /* The slave is not held open here: like a real device node, the port is open only
     * while a host has it (so `vigil doctor` sees no other process holding it). Meanwhile
     * the master reports a hang-up and bytes written to it go nowhere, as on a real line. */
    close(slave);
    c->master = master;
    c->slave = -1;
    return 0;
}

void cable_unplug(cable *c) {
    if (c->master < 0) return;
    unlink(c->link);
    close(c->master);
    if (c->slave >= 0) close(c->slave);
    c->master = c->slave = -1;
}

static uint32_t next_noise(cable_line *l) {
    uint32_t x = l->noise_state ? l->noise_state : 0x9E3779B9u;
    x ^= x << 13;
    x ^= x >> 17;
    x ^= x << 5;
    return l->noise_state = x;
}

int cable_send(cable_line *l, uint8_t byte, uint64_t now, uint64_t byte_cycles, int *corrupted) {
    *corrupted = 0;
    if (l->pos == 0) l->chosen = l->every && next_noise(l) % l->every == 0;
    /* The third byte of a chosen line is always inside the body that the CRC covers. */
    if (l->chosen && l->pos == 2 && byte != '\n') {
        uint8_t shift = (uint8_t)(1 + next_noise(l) % 94); /* another printable character */
        byte = (uint8_t)(0x20 + (byte - 0x20 + shift) % 95);
        l->corrupted++;
        *corrupted = 1;
    }
    l->pos++;
    int end = byte == '\n';
    if (end) {
        l->line_no++;
        l->lines++;
        l->pos = 0;
    }
    if (l->head - l->tail >= CABLE_QUEUE) {
        l->dropped++;
        return end;
    }
    /* A UART shifts one frame at a time: a byte starts when the line is free. */
    uint64_t start = l->free_at > now ? l->free_at : now;
    l->free_at = start + byte_cycles;
    l->due[l->head % CABLE_QUEUE] = l->at_start ? start : l->free_at;
    l->byte[l->head % CABLE_QUEUE] = byte;
    l->head++;
    return end;
}

int cable_take(cable_line *l, uint64_t now) {
    if (l->tail == l->head || l->due[l->tail % CABLE_QUEUE] > now) return -1;
    return l->byte[l->tail++ % CABLE_QUEUE];
}

uint64_t cable_next_due(const cable_line *l) {
    return l->tail == l->head ? UINT64_MAX : l->due[l->tail % CABLE_QUEUE];
}
