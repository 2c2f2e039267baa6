/*
 * A box's board in simavr: the unmodified firmware image on a simulated ATmega328P at
 * 16 MHz, its UART on a pseudo-terminal, its input pins driven and its output pins recorded
 * with simulated-cycle timestamps.
 *
 *   board-sim --hex build/vigil-box.hex --link /tmp/box-1.tty
 *   board-sim --box ports --hex build/vigil-ports.hex --link /tmp/box-2.tty
 *
 * --box names the box the image was built for (ref, the default, or ports: the firmware's
 * boxes.h, whose pin lists this harness reads too); an image that does not carry that box's
 * firmware id is refused.
 *
 * stdin (one command a line; times relative to the moment the line is read, in simulated
 * microseconds, so a batch written at once keeps its exact spacing):
 *   in CH LEVEL [AFTER_US]   input channel CH (1-8 on the reference box, 1-7 on the
 *                            five-port box) active (1) or idle (0)
 *   unplug | plug            pull the cable out (the link path disappears) / put it back
 *   reset                    reset the board (as the reset button; EEPROM is kept)
 *   noise rx|tx EVERY        change one byte in 1 of EVERY lines (drawn) to / from the board
 *   sync TOKEN               answered "synced TOKEN CYCLE" once everything before it ran
 *   stats                    answered with one "stats key=value ..." line
 *   pins                     answered "pins BOX in 1:PD2,... out 1:PB0,..." (the pin map)
 *   quit                     (end of stdin too)
 * stdout (one report a line; CYCLE counts from power-on, never restarts):
 *   ready FREQ_HZ LINK | plug CYCLE LINK | unplug CYCLE | reset CYCLE
 *   out CYCLE CH LEVEL       an output pin changed (channels of the box's pin map)
 *   in CYCLE CH LEVEL        an input pin was driven
 *   rxlf CYCLE               a line from the host finished arriving at the board's UART
 *   txlf CYCLE               a line from the board finished crossing the wire
 *   corrupt CYCLE rx|tx      a byte on the line was changed
 *
 * Why a harness of our own rather than simavr's run_avr with uart_pty: the tests must pull
 * the cable out and put it back, damage chosen lines, and stamp every pin change in cycles;
 * uart_pty owns its pty in a thread of its own and offers none of that.
 */
#define _GNU_SOURCE
#include <errno.h>
#include <poll.h>
#include <signal.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <sys/prctl.h>
#include <time.h>
#include <unistd.h>

#include <avr_ioport.h>
#include <avr_uart.h>
#include <sim_avr.h>
#include <sim_hex.h>
#include <sim_regbit.h>

#include "boxes.h"
#include "cable.h"

#define FREQ 16000000u
#define SLICE_CYCLES 800u          /* 50 us: how often the pty and stdin are looked at */
#define RESYNC_LAG_S 1.0           /* further behind than this (host stopped us): start over */
#define MAX_SCHEDULED 4096u
#define MAX_INPUTS 8
#define MAX_OUTPUTS 10

/* Each box's pin map, from the firmware's own lists (boxes.h): channel n -> port and bit. */
typedef struct {
    char port;
    uint8_t bit;
} pin;

typedef struct {
    const char *name;
    const char *firmware_id;
    unsigned n_inputs, n_outputs;
    pin inputs[MAX_INPUTS], outputs[MAX_OUTPUTS];
} box_pins;

#define PIN(ch, port, bit) {PIN_PORT_##port, bit},
static const box_pins boxes[] = {
    {"ref", REF_FIRMWARE_ID, REF_INPUTS, REF_OUTPUTS, {REF_INPUT_PINS(PIN)}, {REF_OUTPUT_PINS(PIN)}},
    {"ports", PORTS_FIRMWARE_ID, PORTS_INPUTS, PORTS_OUTPUTS, {PORTS_INPUT_PINS(PIN)},
     {PORTS_OUTPUT_PINS(PIN)}},
};
_Static_assert(REF_INPUTS <= MAX_INPUTS && PORTS_INPUTS <= MAX_INPUTS, "room for every input");
_Static_assert(REF_OUTPUTS <= MAX_OUTPUTS && PORTS_OUTPUTS <= MAX_OUTPUTS, "and every output");
static const box_pins *box = &boxes[0];
static const int output_channel[MAX_OUTPUTS] = {1, 2, 3, 4, 5, 6, 7, 8, 9, 10};

typedef struct {
    uint64_t at;
    uint8_t channel, level;
} scheduled_input;

static avr_t *avr;
static avr_uart_t *uart;
static uint64_t cycle_base; /* added to avr->cycle: simavr's count restarts at a reset */
static uint64_t last_raw_cycle;
static cable wire = {.master = -1, .slave = -1};
static avr_irq_t *uart_in;
static avr_irq_t *input_irq[MAX_INPUTS];
static avr_irq_t *output_irq[MAX_OUTPUTS];
static uint8_t input_level[MAX_INPUTS]; /* 1 = active: the switch pulls the pin low */
static scheduled_input schedule[MAX_SCHEDULED];
static unsigned n_scheduled;
static double lag_max_s;
static unsigned resyncs;
static int quitting;

static uint64_t now_cycle(void) {
    if (avr->cycle < last_raw_cycle) cycle_base += last_raw_cycle; /* a watchdog reset */
    last_raw_cycle = avr->cycle;
    return cycle_base + avr->cycle;
}

static double monotonic_s(void) {
    struct timespec t;
    clock_gettime(CLOCK_MONOTONIC, &t);
    return (double)t.tv_sec + (double)t.tv_nsec * 1e-9;
}

/* ------------------------------------------------------------ the UART's line timing */

/*
 * simavr works out the byte time once, when UBRR0L is written, and counts a parity bit in
 * every frame. The firmware sets U2X0 and the frame format after UBRR0L (the datasheet
 * allows any order), so simavr alone would run the line at half speed. The frame time is
 * recomputed here from the registers, as the ATmega328P datasheet (USART0, "Baud Rate
 * Calculations" and "Frame Formats") defines it: 1 start bit, 5-9 data bits, an optional
 * parity bit, 1-2 stop bits, each (UBRR + 1) * (U2X ? 8 : 16) cycles.
 */
static uint64_t frame_cycles(void) {
    uint32_t ubrr = avr_regbit_get(avr, uart->ubrrl) | (avr_regbit_get(avr, uart->ubrrh) << 8);
    uint32_t per_bit = (ubrr + 1) * (avr_regbit_get(avr, uart->u2x) ? 8 : 16);
    static const int data_bits[8] = {5, 6, 7, 8, 8, 8, 8, 9};
    int size = avr_regbit_get(avr, uart->ucsz) | (avr_regbit_get(avr, uart->ucsz2) << 2);
    int parity = (avr->data[uart->r_ucsrc] >> 4) & 3 ? 1 : 0; /* UPM01:0, UCSR0C bits 5:4 */
    int stop = avr_regbit_get(avr, uart->usbs) ? 2 : 1;
    return (uint64_t)per_bit * (uint64_t)(1 + data_bits[size] + parity + stop);
}

static void keep_uart_timing(void) {
    uint64_t want = frame_cycles();
    if (uart->cycles_per_byte != want) uart->cycles_per_byte = want;
}

/* ------------------------------------------------------------ reports */

static void report_uart_byte(struct avr_irq_t *irq, uint32_t value, void *param) {
    (void)irq;
    (void)param;
    int corrupted;
    uint64_t now = now_cycle();
    if (wire.master < 0) { /* nobody on the other end: the byte goes nowhere */
        wire.to_host.dropped++;
        return;
    }
    cable_send(&wire.to_host, (uint8_t)value, now, frame_cycles(), &corrupted);
    if (corrupted) printf("corrupt %llu tx\n", (unsigned long long)now);
}

static void report_output(struct avr_irq_t *irq, uint32_t value, void *param) {
    (void)irq;
    printf("out %llu %d %u\n", (unsigned long long)now_cycle(), *(const int *)param, value & 1);
}

/* ------------------------------------------------------------ inputs */

/* Drive input channel ch (0-based) to its level: active pulls the pin to GND. */
static void drive_input(unsigned ch, uint8_t active) {
    input_level[ch] = active;
    uint8_t high = active ? 0 : 1;
    /* A real pull-up is weak and the switch wins; simavr re-raises a pulled-up input pin
     * whenever the port register is written, so the switch's level is made the pin's
     * "external" default too. */
    char port = box->inputs[ch].port;
    avr_ioport_external_t ext = {.name = (unsigned long)port, .mask = 0, .value = 0};
    uint8_t mask = 0, value = 0;
    for (unsigned i = 0; i < box->n_inputs; i++) {
        if (box->inputs[i].port != port) continue;
        mask |= (uint8_t)(1u << box->inputs[i].bit);
        if (!input_level[i]) value |= (uint8_t)(1u << box->inputs[i].bit);
    }
    ext.mask = mask;
    ext.value = value;
    avr_ioctl(avr, AVR_IOCTL_IOPORT_SET_EXTERNAL(port), &ext);
    avr_raise_irq(input_irq[ch], high);
}

static void schedule_input(uint64_t at, uint8_t channel, uint8_t level) {
    if (n_scheduled == MAX_SCHEDULED) {
        printf("error too many scheduled inputs\n");
        return;
    }
    unsigned i = n_scheduled++;
    while (i > 0 && schedule[i - 1].at > at) { /* keep it sorted; equal times stay in order */
        schedule[i] = schedule[i - 1];
        i--;
    }
    schedule[i] = (scheduled_input){at, channel, level};
}

static void run_due_inputs(uint64_t now) {
    unsigned done = 0;
    while (done < n_scheduled && schedule[done].at <= now) {
        scheduled_input *s = &schedule[done++];
        if (input_level[s->channel] == s->level) continue;
        drive_input(s->channel, s->level);
        printf("in %llu %u %u\n", (unsigned long long)now, s->channel + 1u, s->level);
    }
    if (done) {
        memmove(schedule, schedule + done, (n_scheduled - done) * sizeof schedule[0]);
        n_scheduled -= done;
    }
}

/* ------------------------------------------------------------ the board */

static void restore_pins_after_reset(void) {
    /* A reset clears the PIN registers in simavr while the pins' last values stay cached:
     * toggle each input pin's value so the register sees the switch again (PCMSK is 0 after
     * a reset, so no interrupt follows). Outputs float at reset; the driver stage's
     * pull-down holds them off (common practice for transistor and relay drivers). */
    for (unsigned ch = 0; ch < box->n_inputs; ch++) {
        uint8_t high = input_level[ch] ? 0 : 1;
        avr_raise_irq(input_irq[ch], !high);
        drive_input(ch, input_level[ch]);
    }
    for (unsigned i = 0; i < box->n_outputs; i++) avr_raise_irq(output_irq[i], 0);
}

static void reset_board(void) {
    uint64_t before = now_cycle();
    avr_reset(avr);
    if (avr->cycle < last_raw_cycle) {
        cycle_base += last_raw_cycle - avr->cycle;
        last_raw_cycle = avr->cycle;
    }
    printf("reset %llu\n", (unsigned long long)before);
    restore_pins_after_reset();
}

static avr_uart_t *find_uart(void) {
    for (avr_io_t *io = avr->io_port; io; io = io->next)
        if (io->irq_ioctl_get == AVR_IOCTL_UART_GETIRQ('0')) return (avr_uart_t *)io;
    return NULL;
}

static int load_board(const char *hex) {
    avr = avr_make_mcu_by_name("atmega328p");
    if (!avr) return -1;
    avr_init(avr);
    avr->frequency = FREQ;
    avr->log = LOG_ERROR;
    ihex_chunk_p chunks = NULL;
    int n = read_ihex_chunks(hex, &chunks);
    if (n <= 0) {
        fprintf(stderr, "board-sim: cannot read %s as Intel hex\n", hex);
        return -2; /* said why */
    }
    int named = 0;
    for (int i = 0; i < n; i++)
        if (chunks[i].baseaddr < 0x800000u) { /* flash; no eeprom section in our image */
            avr_loadcode(avr, chunks[i].data, chunks[i].size, chunks[i].baseaddr);
            named |= memmem(chunks[i].data, chunks[i].size, box->firmware_id,
                            strlen(box->firmware_id) + 1) != NULL;
        }
    free_ihex_chunks(chunks);
    if (!named) { /* the pins would mean something else: refuse rather than mislead */
        fprintf(stderr, "board-sim: %s is not an image for box '%s' (no '%s' in it)\n", hex,
                box->name, box->firmware_id);
        return -2;
    }
    avr->pc = 0;

    uart = find_uart();
    if (!uart) return -1;
    uint32_t flags = 0; /* no console echo, no usleep in register polls */
    avr_ioctl(avr, AVR_IOCTL_UART_SET_FLAGS('0'), &flags);
    uart_in = avr_io_getirq(avr, AVR_IOCTL_UART_GETIRQ('0'), UART_IRQ_INPUT);
    avr_irq_register_notify(avr_io_getirq(avr, AVR_IOCTL_UART_GETIRQ('0'), UART_IRQ_OUTPUT),
                            report_uart_byte, NULL);
    for (unsigned i = 0; i < box->n_outputs; i++) {
        const pin *p = &box->outputs[i];
        output_irq[i] = avr_io_getirq(avr, AVR_IOCTL_IOPORT_GETIRQ(p->port), p->bit);
        avr_irq_register_notify(output_irq[i], report_output, (void *)&output_channel[i]);
    }
    for (unsigned ch = 0; ch < box->n_inputs; ch++) {
        const pin *p = &box->inputs[ch];
        input_irq[ch] = avr_io_getirq(avr, AVR_IOCTL_IOPORT_GETIRQ(p->port), p->bit);
        drive_input(ch, 0); /* every switch open, every beam clear */
    }
    return 0;
}

/* ------------------------------------------------------------ control */

static void print_pin_list(const char *label, const pin *pins, unsigned n) {
    printf(" %s", label);
    for (unsigned i = 0; i < n; i++)
        printf("%c%u:P%c%u", i ? ',' : ' ', i + 1, pins[i].port, (unsigned)pins[i].bit);
}

static void print_pins(void) {
    printf("pins %s", box->name);
    print_pin_list("in", box->inputs, box->n_inputs);
    print_pin_list("out", box->outputs, box->n_outputs);
    printf("\n");
}

static char control[8192];
static size_t control_len;

static void command(char *line, uint64_t now_u64) {
    unsigned long long now = (unsigned long long)now_u64;
    unsigned ch, level, every;
    unsigned long long after = 0, token;
    char dir[8];
    if (sscanf(line, "in %u %u %llu", &ch, &level, &after) >= 2) {
        if (ch < 1 || ch > box->n_inputs || level > 1) {
            printf("error bad input command: %s\n", line);
            return;
        }
        schedule_input(now + after * (FREQ / 1000000u), (uint8_t)(ch - 1), (uint8_t)level);
    } else if (strcmp(line, "unplug") == 0) {
        cable_unplug(&wire);
        printf("unplug %llu\n", now);
    } else if (strcmp(line, "plug") == 0) {
        if (cable_plug(&wire) < 0)
            printf("error cannot plug the cable at %s: %s\n", wire.link, strerror(errno));
        else
            printf("plug %llu %s\n", now, wire.link);
    } else if (strcmp(line, "reset") == 0) {
        reset_board();
    } else if (sscanf(line, "noise %7s %u", dir, &every) == 2) {
        cable_line *l = strcmp(dir, "rx") == 0 ? &wire.to_board : &wire.to_host;
        l->every = every;
        l->line_no = 0;
    } else if (sscanf(line, "sync %llu", &token) == 1) {
        printf("synced %llu %llu\n", token, now);
    } else if (strcmp(line, "stats") == 0) {
        printf("stats cycle=%llu lag_max_us=%.0f resyncs=%u rx_lines=%u tx_lines=%u "
               "rx_corrupted=%u tx_corrupted=%u tx_dropped=%u rx_dropped=%u\n",
               now, lag_max_s * 1e6, resyncs, wire.to_board.lines, wire.to_host.lines,
               wire.to_board.corrupted, wire.to_host.corrupted, wire.to_host.dropped,
               wire.to_board.dropped);
    } else if (strcmp(line, "pins") == 0) {
        print_pins();
    } else if (strcmp(line, "quit") == 0) {
        quitting = 1;
    } else if (line[0]) {
        printf("error unknown command: %s\n", line);
    }
}

static void read_control(uint64_t now) {
    ssize_t n = read(0, control + control_len, sizeof control - control_len - 1);
    if (n <= 0) {
        if (n == 0 || (errno != EAGAIN && errno != EINTR)) quitting = 1; /* parent gone */
        return;
    }
    control_len += (size_t)n;
    char *start = control, *lf;
    while ((lf = memchr(start, '\n', control_len - (size_t)(start - control))) != NULL) {
        *lf = 0;
        command(start, now);
        start = lf + 1;
    }
    control_len -= (size_t)(start - control);
    memmove(control, start, control_len);
    if (control_len == sizeof control - 1) control_len = 0; /* an absurd line: drop it */
}

/* ------------------------------------------------------------ the cable */

static void read_host(uint64_t now) {
    uint8_t buf[512];
    ssize_t n = read(wire.master, buf, sizeof buf);
    for (ssize_t i = 0; i < n; i++) {
        int corrupted;
        cable_send(&wire.to_board, buf[i], now, frame_cycles(), &corrupted);
        if (corrupted) printf("corrupt %llu rx\n", (unsigned long long)now);
    }
}

static void deliver_to_host(uint64_t now) {
    uint8_t buf[CABLE_QUEUE];
    size_t n = 0;
    int b;
    while ((b = cable_take(&wire.to_host, now)) >= 0) {
        buf[n++] = (uint8_t)b;
        if (b == '\n') printf("txlf %llu\n", (unsigned long long)now);
    }
    if (n && wire.master >= 0) {
        ssize_t w = write(wire.master, buf, n);
        if (w < (ssize_t)n) wire.to_host.dropped += (uint32_t)(n - (w > 0 ? (size_t)w : 0));
    }
}

/* ------------------------------------------------------------ the loop */

/* Run the core up to `end`, feeding due host bytes and due inputs on the way. */
static int run_until(uint64_t end) {
    uint64_t now = now_cycle();
    while (now < end) {
        int state = avr_run(avr);
        if (state == cpu_Done || state == cpu_Crashed) return -1;
        now = now_cycle();
        if (n_scheduled && schedule[0].at <= now) run_due_inputs(now);
        if (cable_next_due(&wire.to_board) <= now) {
            int b = cable_take(&wire.to_board, now);
            avr_raise_irq(uart_in, (uint32_t)b);
            if (b == '\n') printf("rxlf %llu\n", (unsigned long long)(now + frame_cycles()));
        }
    }
    return 0;
}

int main(int argc, char **argv) {
    const char *hex = NULL, *box_name = "ref";
    for (int i = 1; i + 1 < argc; i += 2) {
        if (strcmp(argv[i], "--hex") == 0)
            hex = argv[i + 1];
        else if (strcmp(argv[i], "--link") == 0)
            wire.link = argv[i + 1];
        else if (strcmp(argv[i], "--box") == 0)
            box_name = argv[i + 1];
    }
    box = NULL;
    for (unsigned i = 0; i < sizeof boxes / sizeof boxes[0]; i++)
        if (strcmp(boxes[i].name, box_name) == 0) box = &boxes[i];
    if (!hex || !wire.link || !box) {
        fprintf(stderr, "usage: board-sim [--box ref|ports] --hex FILE --link PATH\n");
        return 2;
    }
    prctl(PR_SET_PDEATHSIG, SIGTERM); /* never outlive the test or tool that started us */
    prctl(PR_SET_TIMERSLACK, 1000UL); /* 1 us: sleeps end when asked, not up to 50 us late */
    signal(SIGPIPE, SIG_IGN);
    setvbuf(stdout, NULL, _IOFBF, 1 << 16);
    int loaded = load_board(hex);
    if (loaded < 0) {
        if (loaded == -1) fprintf(stderr, "board-sim: cannot set up an atmega328p with %s\n", hex);
        return 1;
    }
    wire.to_board.at_start = 1;
    wire.to_host.noise_state = 0x1234567u;
    wire.to_board.noise_state = 0x7654321u;
    if (cable_plug(&wire) < 0) {
        fprintf(stderr, "board-sim: cannot link a pty at %s: %s\n", wire.link, strerror(errno));
        return 1;
    }
    printf("ready %u %s\n", FREQ, wire.link);
    fflush(stdout);

    double t0 = monotonic_s();
    uint64_t c0 = now_cycle();
    while (!quitting) {
        uint64_t now = now_cycle(), end = now + SLICE_CYCLES;
        /* Keep simulated time in step with the host's clock: a slice runs only once the
         * host's clock has passed its end, so the board is never ahead of the host. */
        int watch_host = wire.master >= 0;
        for (;;) {
            double wait_s = (double)(end - c0) / FREQ - (monotonic_s() - t0);
            if (-wait_s > lag_max_s) lag_max_s = -wait_s;
            if (-wait_s > RESYNC_LAG_S) { /* we were stopped for a long time: do not race */
                t0 = monotonic_s();
                c0 = now;
                resyncs++;
                continue;
            }
            struct pollfd fds[2] = {{.fd = 0, .events = POLLIN},
                                    {.fd = wire.master, .events = POLLIN}};
            struct timespec wait = {0, wait_s > 0 ? (long)(wait_s * 1e9) : 0};
            int ready = ppoll(fds, watch_host && wire.master >= 0 ? 2 : 1, &wait, NULL);
            if (ready > 0) {
                if (fds[0].revents & (POLLIN | POLLHUP | POLLERR)) read_control(now);
                if (watch_host && wire.master >= 0) {
                    if (fds[1].revents & POLLIN) read_host(now);
                    if (fds[1].revents & POLLHUP) watch_host = 0; /* no host: look next slice */
                }
                fflush(stdout);
            }
            if (quitting || wait_s <= 0) break;
        }
        if (run_until(end) < 0) {
            printf("error the simulated core stopped (state %d)\n", avr->state);
            break;
        }
        keep_uart_timing();
        deliver_to_host(now_cycle());
        fflush(stdout);
    }
    fflush(stdout);
    cable_unplug(&wire);
    avr_terminate(avr);
    return 0;
}
