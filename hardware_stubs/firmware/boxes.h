/*
 * The boxes this firmware builds for: each box's identity, channel counts and pins, as plain
 * data (no registers), so the board layer (main_avr.c) and the simulated board
 * (hardware_stubs/simulator/board_sim.c) read the same tables. The kinds behind the channels
 * are in channels.c (reference box) and channels_ports.c (five-port box).
 *
 *   make              the reference box  (build/vigil-box.hex)
 *   make BOX=ports    the five-port box  (build/vigil-ports.hex; compiled with -DBOX_PORTS)
 *
 * A pin list is X(channel, port letter, bit) per channel, in channel order (PROTOCOL.md
 * channel numbers, 1-based). main_avr.c reads inputs 1-6 on PD2-PD7 and any further ones
 * from PC4 up, in one pass over each port; it checks at compile time that a box's input
 * list has that shape. Outputs may sit on any bit of ports B and C.
 */
#ifndef BOXES_H
#define BOXES_H

/* ---------------------------------------------------------- the reference box: 2 levers */
#define REF_FIRMWARE_ID "vigil-ref-1.0"
#define REF_INPUTS 8u
#define REF_OUTPUTS 10u
#define REF_INPUT_PINS(X)                                                                 \
    X(1, D, 2)  /* left lever switch */                                                   \
    X(2, D, 3)  /* right lever switch */                                                  \
    X(3, D, 4)  /* magazine head-entry beam */                                            \
    X(4, D, 5)  /* left nose-poke beam */                                                 \
    X(5, D, 6)  /* right nose-poke beam */                                                \
    X(6, D, 7)  /* lickometer */                                                          \
    X(7, C, 4)  /* pellet sensor */                                                       \
    X(8, C, 5)  /* centre nose-poke beam */
#define REF_OUTPUT_PINS(X)                                                                \
    X(1, B, 0)  /* left lever */                                                          \
    X(2, B, 1)  /* right lever */                                                         \
    X(3, B, 2)  /* left cue light */                                                      \
    X(4, B, 3)  /* right cue light */                                                     \
    X(5, B, 4)  /* house light */                                                         \
    X(6, B, 5)  /* tone gate (board LED too) */                                           \
    X(7, C, 0)  /* pellet feeder */                                                       \
    X(8, C, 1)  /* sync TTL */                                                            \
    X(9, C, 2)  /* aversive gate */                                                       \
    X(10, C, 3) /* magazine light */

/* ---------------------------------------------------------- the five-port box: nose pokes
 * Every pin keeps the direction it has on the reference box (an input there is an input
 * here), so one driver board serves both; PC5 is spare (input with its pull-up). Feeder,
 * sync and pellet sensor stay on their reference pins. */
#define PORTS_FIRMWARE_ID "vigil-ports-1.0"
#define PORTS_INPUTS 7u
#define PORTS_OUTPUTS 10u
#define PORTS_INPUT_PINS(X)                                                               \
    X(1, D, 2)  /* centre nose-poke beam */                                               \
    X(2, D, 3)  /* west nose-poke beam */                                                 \
    X(3, D, 4)  /* east nose-poke beam */                                                 \
    X(4, D, 5)  /* north nose-poke beam */                                                \
    X(5, D, 6)  /* south nose-poke beam */                                                \
    X(6, D, 7)  /* magazine head-entry beam */                                            \
    X(7, C, 4)  /* pellet sensor */
#define PORTS_OUTPUT_PINS(X)                                                              \
    X(1, B, 0)  /* centre port light */                                                   \
    X(2, B, 1)  /* west port light */                                                     \
    X(3, B, 2)  /* east port light */                                                     \
    X(4, B, 3)  /* north port light */                                                    \
    X(5, B, 4)  /* south port light */                                                    \
    X(6, B, 5)  /* house light (board LED too) */                                         \
    X(7, C, 0)  /* pellet feeder */                                                       \
    X(8, C, 1)  /* sync TTL */                                                            \
    X(9, C, 2)  /* magazine light */                                                      \
    X(10, C, 3) /* tone gate */

/* ---------------------------------------------------------- the box of this build */
#ifdef BOX_PORTS
#define BOX_FIRMWARE_ID PORTS_FIRMWARE_ID
#define BOX_INPUTS PORTS_INPUTS
#define BOX_OUTPUTS PORTS_OUTPUTS
#define BOX_INPUT_PINS PORTS_INPUT_PINS
#define BOX_OUTPUT_PINS PORTS_OUTPUT_PINS
#else
#define BOX_FIRMWARE_ID REF_FIRMWARE_ID
#define BOX_INPUTS REF_INPUTS
#define BOX_OUTPUTS REF_OUTPUTS
#define BOX_INPUT_PINS REF_INPUT_PINS
#define BOX_OUTPUT_PINS REF_OUTPUT_PINS
#endif

/* Port letters as values: PIN_PORT_##port gives 'B', 'C' or 'D'. */
#define PIN_PORT_B 'B'
#define PIN_PORT_C 'C'
#define PIN_PORT_D 'D'

#endif
