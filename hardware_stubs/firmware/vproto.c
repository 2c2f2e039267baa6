/* Vigil reference firmware: protocol core. See vproto.h and hardware_stubs/PROTOCOL.md. */
#include "vproto.h"

#include <string.h>

static const char firmware_id[] VP_FLASH = VP_FIRMWARE_ID;
static const char result_words[4][12] VP_FLASH = {"ok", "lost", "no-channel", "bad-value"};

/* True once `now` has reached `deadline` on a wrapping 32-bit counter (half-range rule). */
static uint8_t reached(uint32_t now, uint32_t deadline) {
    return (int32_t)(now - deadline) >= 0;
}

static void write_channels(vl_writer *w, uint8_t n, const char (*codes)[3]) {
    vl_space(w);
    if (n == 0) {
        vl_byte(w, '-');
        return;
    }
    for (uint8_t i = 0; i < n; i++) {
        if (i) vl_byte(w, ',');
        vl_u32(w, (uint32_t)i + 1);
        vl_byte(w, ':');
        vl_byte(w, VP_FLASH_BYTE(&codes[i][0]));
        vl_byte(w, VP_FLASH_BYTE(&codes[i][1]));
    }
}

/* ------------------------------------------------------------------ state */

void vp_init(vp_device *d, const vp_channel_map *map, vp_output_fn set_output,
             vp_clock_fn clock, uint16_t boot, uint8_t input_levels, uint32_t now_us) {
    memset(d, 0, sizeof *d);
    d->map = map;
    d->set_output = set_output;
    d->clock = clock;
    d->boot = boot;
    d->cursor = 1;
    d->want_identity = 1; /* announce ourselves after every boot */
    d->beat_due_us = now_us + VP_BEAT_US;
    d->host_silent = 1; /* outputs start off: already safe */
    for (uint8_t i = 0; i < map->n_inputs && i < VP_MAX_INPUTS; i++)
        d->inputs[i].stable = (input_levels >> i) & 1u;
    d->stable_levels = (uint8_t)(input_levels & (uint8_t)((1u << map->n_inputs) - 1u));
    for (uint8_t ch = 1; ch <= map->n_outputs; ch++) set_output(ch, 0);
}

static uint32_t oldest_held(const vp_device *d) {
    return d->last_seq >= VP_RING ? d->last_seq - VP_RING + 1 : 1;
}

void vp_add_event(vp_device *d, uint8_t channel, uint8_t rising, uint32_t t_us) {
    d->last_seq++;
    vp_event *e = &d->ring[d->last_seq & (VP_RING - 1)];
    e->t_us = t_us;
    e->channel_edge = (uint8_t)((channel & 0x7F) | (rising ? 0x80 : 0));
    if (d->cursor < oldest_held(d)) d->cursor = oldest_held(d); /* never written: lost */
}

/* ------------------------------------------------------------------ inputs */

void vp_input_changed(vp_device *d, uint8_t index, uint32_t when_us) {
    if (index >= VP_MAX_INPUTS) return;
    vp_debounce *in = &d->inputs[index];
    if (!in->pending) {
        in->pending = 1;
        in->first_us = when_us;
        d->pending_mask |= (uint8_t)(1u << index);
    }
    in->last_us = when_us;
}

void vp_poll_inputs(vp_device *d, uint8_t levels, uint32_t now_us) {
    /* A moving mask, not levels >> i: an 8-bit core shifts by a variable count in a loop. */
    uint8_t used = (uint8_t)((1u << d->map->n_inputs) - 1u);
    if (!d->pending_mask && (levels & used) == d->stable_levels) return; /* most passes */
    uint8_t mask = 1u;
    for (uint8_t i = 0; i < d->map->n_inputs && i < VP_MAX_INPUTS; i++, mask <<= 1) {
        vp_debounce *in = &d->inputs[i];
        uint8_t level = (levels & mask) ? 1u : 0u;
        if (!in->pending) {
            if (level != in->stable) vp_input_changed(d, i, now_us); /* a change missed */
            continue;
        }
        if (!reached(now_us, in->last_us + VP_DEBOUNCE_US)) continue;
        in->pending = 0;
        d->pending_mask &= (uint8_t)~mask;
        if (level == in->stable) continue; /* a flicker that came back: no edge */
        in->stable = level;
        d->stable_levels = (uint8_t)(level ? d->stable_levels | mask : d->stable_levels & ~mask);
        vp_add_event(d, (uint8_t)(i + 1), level, in->first_us);
    }
}

/* ------------------------------------------------------------------ outputs */

static void drive(vp_device *d, uint8_t ch, uint8_t on) {
    uint16_t bit = (uint16_t)(1u << (ch - 1));
    d->outputs_on = on ? (uint16_t)(d->outputs_on | bit) : (uint16_t)(d->outputs_on & ~bit);
    d->set_output(ch, on);
}

static void all_off(vp_device *d) {
    for (uint8_t ch = 1; ch <= d->map->n_outputs; ch++) drive(d, ch, 0);
    d->pulsing = 0;
}

void vp_end_pulses(vp_device *d, uint32_t now_us) {
    /* A moving bit, and a stop after the last pulsing channel: 1 << (ch - 1) is a loop on an
     * 8-bit core, and this runs many times a pass while a pulse is on. */
    uint16_t bit = 1u;
    for (uint8_t ch = 1; ch <= d->map->n_outputs && d->pulsing >= bit; ch++, bit <<= 1) {
        if ((d->pulsing & bit) && reached(now_us, d->pulse_end_us[ch - 1])) {
            d->pulsing &= (uint16_t)~bit;
            drive(d, ch, 0);
        }
    }
}

void vp_tick(vp_device *d, uint32_t now_us) {
    vp_end_pulses(d, now_us);
    if (!d->host_silent && reached(now_us, d->host_seen_us + VP_HOST_SILENCE_US)) {
        d->host_silent = 1;
        all_off(d);
    }
}

/* ------------------------------------------------------------------ receiving */

uint8_t vp_can_receive(const vp_device *d) { return d->ack_count < VP_ACK_QUEUE; }

static void queue_ack(vp_device *d, uint32_t id, uint8_t result, uint32_t value, uint8_t before) {
    vp_pending_ack *a = &d->acks[(d->ack_head + d->ack_count) % VP_ACK_QUEUE];
    a->id = id;
    a->result = result;
    a->value = value;
    a->before = before;
    d->ack_count++;
}

static const vp_memo *remembered(const vp_device *d, uint32_t id, uint16_t crc) {
    for (uint8_t i = 0; i < VP_MEMORY; i++)
        if (d->memo[i].id == id && d->memo[i].crc == crc) return &d->memo[i];
    return 0;
}

static void remember(vp_device *d, uint32_t id, uint16_t crc, uint8_t result) {
    vp_memo *m = &d->memo[d->memo_next];
    m->id = id;
    m->crc = crc;
    m->result = result;
    d->memo_next = (uint8_t)((d->memo_next + 1) % VP_MEMORY);
}

/* set / pulse: carried out once per (id, line CRC); repeats only get their ack again. */
static uint8_t actuate(vp_device *d, uint8_t pulse, uint32_t ch, uint32_t arg, uint32_t now_us) {
    if (ch < 1 || ch > d->map->n_outputs) return VP_NO_CHANNEL;
    uint16_t bit = (uint16_t)(1u << (ch - 1));
    if (pulse) {
        /* The width counts from the output's turning on, read just before it does. */
        uint32_t on_us = d->clock ? d->clock() : now_us;
        d->pulse_end_us[ch - 1] = on_us + arg * 1000UL;
        d->pulsing |= bit;
        drive(d, (uint8_t)ch, 1);
    } else {
        d->pulsing &= (uint16_t)~bit;
        drive(d, (uint8_t)ch, (uint8_t)arg);
    }
    return VP_OK;
}

static void replay(vp_device *d, uint32_t id, uint32_t from) {
    uint32_t oldest = oldest_held(d);
    if (from > d->last_seq + 1) {
        queue_ack(d, id, VP_BAD_VALUE, d->last_seq + 1, 0);
    } else if (from < oldest) {
        d->cursor = oldest;
        queue_ack(d, id, VP_LOST, oldest, 0);
    } else {
        d->cursor = from;
        queue_ack(d, id, VP_OK, from, 0);
    }
}

/* A whole line (no LF) is in d->rx: check it, then carry it out. Returns 0 if rejected. */
static uint8_t take_line(vp_device *d, uint32_t now_us) {
    uint8_t n = d->rx_len;
    if (n && d->rx[n - 1] == '\r') n--;
    if (n < 6) return 0;
    for (uint8_t i = 0; i < n; i++)
        if (d->rx[i] < 0x20 || d->rx[i] > 0x7E) return 0;
    /* " XXXX" at the end, CRC over everything before the space. */
    if (d->rx[n - 5] != ' ') return 0;
    uint16_t crc_sent = 0;
    for (uint8_t i = n - 4; i < n; i++) {
        uint8_t h = vl_hex_digit(d->rx[i]);
        if (h > 15) return 0;
        crc_sent = (uint16_t)((crc_sent << 4) | h);
    }
    uint8_t body = (uint8_t)(n - 5);
    uint16_t crc = vp_crc16(0xFFFFu, (const uint8_t *)d->rx, body);
    if (crc != crc_sent) return 0;

    /* Fields: id verb [a [b]] separated by exactly one space. */
    const char *field[4];
    uint8_t flen[4], count = 0, start = 0;
    for (uint8_t i = 0; i <= body; i++) {
        if (i == body || d->rx[i] == ' ') {
            if (i == start || count == 4) return 0;
            field[count] = &d->rx[start];
            flen[count++] = (uint8_t)(i - start);
            start = (uint8_t)(i + 1);
        }
    }
    uint32_t id, a = 0, b = 0;
    if (count < 3 || !vl_parse_u32(field[0], flen[0], &id) || id == 0) return 0;

    if (vl_is_word(field[1], flen[1], "set") || vl_is_word(field[1], flen[1], "pulse")) {
        uint8_t pulse = field[1][0] == 'p';
        if (count != 4 || !vl_parse_u32(field[2], flen[2], &a) || a > 255) return 0;
        if (pulse) {
            if (!vl_parse_u32(field[3], flen[3], &b) || b < 1 || b > 65535UL) return 0;
        } else {
            if (flen[3] != 1 || (field[3][0] != '0' && field[3][0] != '1')) return 0;
            b = (uint32_t)(field[3][0] - '0');
        }
        const vp_memo *m = remembered(d, id, crc);
        uint8_t result = m ? m->result : actuate(d, pulse, a, b, now_us);
        if (!m) remember(d, id, crc, result);
        queue_ack(d, id, result, 0, 0);
    } else if (vl_is_word(field[1], flen[1], "ask")) {
        if (count != 3 || flen[2] > 8) return 0;
        for (uint8_t i = 0; i < flen[2]; i++)
            if (field[2][i] < 'a' || field[2][i] > 'z') return 0;
        if (vl_is_word(field[2], flen[2], "iam"))
            queue_ack(d, id, VP_OK, 0, 'i');
        else if (vl_is_word(field[2], flen[2], "beat"))
            queue_ack(d, id, VP_OK, 0, 'b');
        else
            queue_ack(d, id, VP_BAD_VALUE, 0, 0);
    } else if (vl_is_word(field[1], flen[1], "replay")) {
        if (count != 3 || !vl_parse_u32(field[2], flen[2], &a) || a == 0) return 0;
        replay(d, id, a);
    } else {
        return 0; /* unknown verb, or a device verb echoed back */
    }
    d->host_seen_us = now_us;
    d->host_silent = 0;
    return 1;
}

void vp_receive(vp_device *d, uint8_t byte, uint32_t now_us) {
    if (byte != '\n') {
        if (d->rx_len < VP_RX_MAX)
            d->rx[d->rx_len++] = (char)byte;
        else
            d->rx_overlong = 1; /* keep dropping until the LF */
        return;
    }
    if (d->rx_overlong || !take_line(d, now_us)) d->rx_rejected++;
    d->rx_len = 0;
    d->rx_overlong = 0;
}

/* ------------------------------------------------------------------ writing */

static uint8_t write_identity(vp_device *d, vp_put_fn put) {
    vl_writer w;
    vl_start(&w, put, d->cursor - 1, "iam");
    vl_field_flash(&w, firmware_id);
    vl_field_u32(&w, VP_PROTOCOL_VERSION);
    vl_field_u32(&w, d->boot);
    write_channels(&w, d->map->n_inputs, d->map->input_codes);
    write_channels(&w, d->map->n_outputs, d->map->output_codes);
    return vl_finish(&w);
}

static uint8_t write_beat(vp_device *d, uint32_t now_us, vp_put_fn put) {
    vl_writer w;
    d->beat_due_us = now_us + VP_BEAT_US;
    vl_start(&w, put, d->cursor - 1, "beat");
    vl_field_u32(&w, now_us);
    vl_field_u32(&w, d->boot);
    vl_field_u32(&w, d->rx_rejected);
    return vl_finish(&w);
}

/* Order: a query's line, then acks, the boot identity, a due beat, then events in order. */
uint8_t vp_write_next(vp_device *d, uint32_t now_us, vp_put_fn put) {
    vl_writer w;
    if (d->ack_count) {
        vp_pending_ack *a = &d->acks[d->ack_head];
        if (a->before == 'i') {
            a->before = 0;
            return write_identity(d, put);
        }
        if (a->before == 'b') {
            a->before = 0;
            return write_beat(d, now_us, put);
        }
        vl_start(&w, put, d->cursor - 1, "ack");
        vl_field_u32(&w, a->id);
        vl_field_flash(&w, result_words[a->result]);
        vl_field_u32(&w, now_us);
        vl_field_u32(&w, a->value);
        d->ack_head = (uint8_t)((d->ack_head + 1) % VP_ACK_QUEUE);
        d->ack_count--;
        return vl_finish(&w);
    }
    if (d->want_identity) {
        d->want_identity = 0;
        return write_identity(d, put);
    }
    if (reached(now_us, d->beat_due_us)) return write_beat(d, now_us, put);
    if (d->cursor <= d->last_seq) {
        const vp_event *e = &d->ring[d->cursor & (VP_RING - 1)];
        vl_start(&w, put, d->cursor, "edge");
        vl_field_u32(&w, e->channel_edge & 0x7Fu);
        vl_space(&w);
        vl_byte(&w, (e->channel_edge & 0x80u) ? '+' : '-');
        vl_field_u32(&w, e->t_us);
        d->cursor++;
        return vl_finish(&w);
    }
    return 0;
}
