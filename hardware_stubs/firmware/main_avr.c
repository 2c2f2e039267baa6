/*
 * Vigil reference firmware: ATmega328P board layer (16 MHz, e.g. an Uno-class board).
 *
 * Pins: the box's lists in boxes.h (the reference box by default, the five-port box with
 * make BOX=ports; both tables are in the README's hardware section); kinds in channels.c
 * or channels_ports.c.
 *   inputs, active low (internal pull-up; a switch or open-collector sensor pulls to GND):
 *     channels 1-6 on PD2-PD7, further ones from PC4 up
 *   outputs, active high (to driver transistors or relay boards; low at reset = safe):
 *     any of PB0-PB5 and PC0-PC5
 *   spare pins of those ports: inputs with their pull-ups, so none floats (ATmega328P
 *     datasheet, I/O ports, "Unconnected Pins")
 *   serial: PD0 RX, PD1 TX (USB bridge), 8N1 at BAUD (default 115200)
 *   PB3-PB5 double as the ISP programming pins: unplug their loads while programming.
 *
 * Timing: Timer1 runs free at F_CPU / 8 (0.5 us ticks); its overflow count gives a 32-bit
 * microsecond clock that wraps every 2^32 us. Pin-change interrupts stamp every raw input
 * change; the main loop debounces, times pulses, and writes lines while the transmit ring
 * has room for a whole one, so it never waits on the UART.
 */
#ifndef F_CPU
#define F_CPU 16000000UL
#endif
#ifndef BAUD
#define BAUD 115200
#endif

#include <avr/eeprom.h>
#include <avr/interrupt.h>
#include <avr/io.h>
#include <avr/wdt.h>
#include <util/atomic.h>
/* 115200 baud from 16 MHz is 117647 (+2.1 %), within what UARTs tolerate at 8N1. */
#define BAUD_TOL 3
#include <util/setbaud.h>

#include "channels.h"
#include "vproto.h"

/* Inputs whose sensor drives high when active (none on either box). */
#define INPUT_ACTIVE_HIGH 0x00u

/* Masks of the box's pins on each port, worked out from its lists in boxes.h. */
#define PIN_ON_B_B 1
#define PIN_ON_B_C 0
#define PIN_ON_B_D 0
#define PIN_ON_C_B 0
#define PIN_ON_C_C 1
#define PIN_ON_C_D 0
#define PIN_ON_D_B 0
#define PIN_ON_D_C 0
#define PIN_ON_D_D 1
#define MASK_B(ch, port, bit) | (PIN_ON_B_##port << (bit))
#define MASK_C(ch, port, bit) | (PIN_ON_C_##port << (bit))
#define MASK_D(ch, port, bit) | (PIN_ON_D_##port << (bit))
#define OUTPUTS_B (0u BOX_OUTPUT_PINS(MASK_B))
#define OUTPUTS_C (0u BOX_OUTPUT_PINS(MASK_C))
#define OUTPUTS_D (0u BOX_OUTPUT_PINS(MASK_D))
#define INPUTS_C (0u BOX_INPUT_PINS(MASK_C))
#define INPUTS_D (0u BOX_INPUT_PINS(MASK_D))
/* Pins a box may use: PB6-PB7 hold the crystal, PC6 is RESET, PD0-PD1 the serial line. */
#define USABLE_B 0x3Fu
#define USABLE_C 0x3Fu
#define USABLE_D 0xFCu
#define PULLED_UP_B (USABLE_B & ~OUTPUTS_B)
#define PULLED_UP_C (USABLE_C & ~OUTPUTS_C)
#define PULLED_UP_D (USABLE_D & ~OUTPUTS_D)

/* input_levels() and the pin-change handlers read the inputs in one pass per port: a box
 * must keep that shape. */
#define INPUT_SHAPE(ch, port, bit) \
    &&(PIN_ON_D_##port ? (bit) == (ch) + 1 : PIN_ON_C_##port && (bit) == (ch)-3)
#define ONE(ch, port, bit) +1
_Static_assert(1 BOX_INPUT_PINS(INPUT_SHAPE), "inputs 1-6 on PD2-PD7, then PC4 up (boxes.h)");
_Static_assert((0 BOX_INPUT_PINS(ONE)) == BOX_INPUTS, "one input pin per input channel");
_Static_assert(__builtin_popcount(OUTPUTS_B) + __builtin_popcount(OUTPUTS_C) == BOX_OUTPUTS,
               "one output pin per output channel, none shared");
_Static_assert(INPUTS_D == USABLE_D && OUTPUTS_D == 0, "port D carries inputs 1-6 only");
_Static_assert(((OUTPUTS_B & ~USABLE_B) | (OUTPUTS_C & ~USABLE_C) | (OUTPUTS_C & INPUTS_C)) == 0,
               "outputs on usable pins, none shared with an input");

static vp_device box;

static volatile uint32_t timer_overflows;
static volatile uint8_t rx_ring[64];
static volatile uint8_t rx_head, rx_tail; /* ISR writes head, main reads tail */
static volatile uint8_t tx_ring[256];     /* uint8_t indices wrap with the ring */
static volatile uint8_t tx_head, tx_tail; /* main writes head, ISR reads tail */
static uint8_t last_pind, last_pinc;

/* Output channel n -> port (0 B, 1 C) in bit 4, pin in bits 0-2. */
#define OUTPUT_PIN(ch, port, bit) (PIN_ON_C_##port << 4 | (bit)),
static const uint8_t output_pins[BOX_OUTPUTS] PROGMEM = {BOX_OUTPUT_PINS(OUTPUT_PIN)};

/* The watchdog survives a reset it caused: stop it before anything else runs. */
void early_watchdog_off(void) __attribute__((naked, used, section(".init3")));
void early_watchdog_off(void) {
    MCUSR = 0;
    wdt_disable();
}

ISR(TIMER1_OVF_vect) { timer_overflows++; }

/* Microseconds since boot, mod 2^32; call with interrupts disabled. */
static uint32_t clock_us_locked(void) {
    uint16_t ticks = TCNT1;
    uint32_t overflows = timer_overflows;
    if ((TIFR1 & _BV(TOV1)) && ticks < 0x8000u) overflows++; /* overflow not yet serviced */
    /* overflows * 32768 + ticks / 2, mod 2^32. Written as a shift by 16 (byte moves) plus
     * one bit, because avr-gcc turns a 32-bit shift by 15 into a 15-pass loop: with four
     * clock reads a pass, that alone made the idle main loop take about 60 us. */
    uint32_t t = (overflows >> 1) << 16;
    if (overflows & 1u) t += 0x8000u;
    return t + (ticks >> 1);
}

static uint32_t clock_us(void) {
    uint32_t t;
    ATOMIC_BLOCK(ATOMIC_RESTORESTATE) { t = clock_us_locked(); }
    return t;
}

/* Bit i = input i + 1 active. */
static uint8_t input_levels(void) {
    uint8_t raw = (uint8_t)((PIND >> 2) | ((PINC & INPUTS_C) << 2));
    return (uint8_t)(~raw ^ INPUT_ACTIVE_HIGH);
}

static void note_changes(uint8_t changed, uint8_t first_index) {
    uint32_t now = clock_us_locked();
    for (uint8_t i = 0; changed; i++, changed >>= 1)
        if (changed & 1u) vp_input_changed(&box, (uint8_t)(first_index + i), now);
}

ISR(PCINT2_vect) { /* PD2..PD7 -> inputs 1..6 */
    uint8_t pins = PIND;
    note_changes((uint8_t)((pins ^ last_pind) >> 2), 0);
    last_pind = pins;
}

ISR(PCINT1_vect) { /* PC4.. -> inputs 7.. */
    uint8_t pins = PINC;
    note_changes((uint8_t)(((pins ^ last_pinc) >> 4) & (INPUTS_C >> 4)), 6);
    last_pinc = pins;
}

ISR(USART_RX_vect) {
    uint8_t byte = UDR0;
    uint8_t next = (uint8_t)((rx_head + 1) % sizeof rx_ring);
    if (next != rx_tail) { /* a full ring drops the byte; the line's CRC then fails */
        rx_ring[rx_head] = byte;
        rx_head = next;
    }
}

ISR(USART_UDRE_vect) {
    if (tx_tail == tx_head) {
        UCSR0B &= (uint8_t)~_BV(UDRIE0);
        return;
    }
    UDR0 = tx_ring[tx_tail++];
}

/* Pulse ends are checked between every step of the main loop and every byte written: one
 * pass takes 50-100 us, a line to format or check longer, and a pulse should end within a
 * few tens of microseconds of its time. */
static void end_pulses_now(void) {
    if (box.pulsing) vp_end_pulses(&box, clock_us());
}

static void transmit(uint8_t byte) {
    tx_ring[tx_head++] = byte; /* the caller checked there is room */
    UCSR0B |= _BV(UDRIE0);
    end_pulses_now(); /* a whole line takes a while to format */
}

static uint8_t tx_free(void) { return (uint8_t)(255u - (uint8_t)(tx_head - tx_tail)); }

static void set_output(uint8_t channel, uint8_t on) {
    if (channel < 1 || channel > BOX_OUTPUTS) return;
    uint8_t pin = pgm_read_byte(&output_pins[channel - 1]);
    uint8_t mask = (uint8_t)_BV(pin & 0x07u);
    volatile uint8_t *port = (pin & 0x10u) ? &PORTC : &PORTB;
    ATOMIC_BLOCK(ATOMIC_RESTORESTATE) {
        if (on)
            *port |= mask;
        else
            *port &= (uint8_t)~mask;
    }
}

static void setup(void) {
    DDRB |= OUTPUTS_B; /* outputs low (PORTx is 0 at reset) */
    DDRC |= OUTPUTS_C;
#if PULLED_UP_B
    DDRB &= (uint8_t)~PULLED_UP_B;
    PORTB |= PULLED_UP_B;
#endif
    DDRD &= (uint8_t)~PULLED_UP_D;
    PORTD |= PULLED_UP_D; /* pull-ups on the inputs and spare pins */
    DDRC &= (uint8_t)~PULLED_UP_C;
    PORTC |= PULLED_UP_C;

    UBRR0H = UBRRH_VALUE;
    UBRR0L = UBRRL_VALUE;
#if USE_2X
    UCSR0A |= _BV(U2X0);
#else
    UCSR0A &= (uint8_t)~_BV(U2X0);
#endif
    UCSR0C = _BV(UCSZ01) | _BV(UCSZ00);
    UCSR0B = _BV(RXEN0) | _BV(TXEN0) | _BV(RXCIE0);

    TCCR1A = 0;
    TCCR1B = _BV(CS11); /* F_CPU / 8 */
    TIMSK1 = _BV(TOIE1);

    last_pind = PIND;
    last_pinc = PINC;
    PCMSK2 = INPUTS_D;
    PCMSK1 = INPUTS_C;
    PCICR = _BV(PCIE2) | _BV(PCIE1);

    /* A boot counter in EEPROM tells the host that a restart emptied the event ring. */
    uint16_t boot = (uint16_t)(eeprom_read_word((uint16_t *)0) + 1u);
    eeprom_update_word((uint16_t *)0, boot);

    vp_init(&box, &box_channels, set_output, clock_us, boot, input_levels(), 0);
    wdt_enable(WDTO_500MS);
    sei();
}

int main(void) {
    setup();
    for (;;) {
        wdt_reset();
        uint32_t now = clock_us();
        while (rx_tail != rx_head && vp_can_receive(&box)) {
            vp_receive(&box, rx_ring[rx_tail], now);
            rx_tail = (uint8_t)((rx_tail + 1) % sizeof rx_ring);
            end_pulses_now();
        }
        ATOMIC_BLOCK(ATOMIC_RESTORESTATE) { /* the pin-change ISRs share the debouncers */
            vp_poll_inputs(&box, input_levels(), clock_us_locked());
        }
        vp_tick(&box, clock_us());
        if (tx_free() >= VP_LINE_MAX) vp_write_next(&box, clock_us(), transmit);
        end_pulses_now();
    }
}
