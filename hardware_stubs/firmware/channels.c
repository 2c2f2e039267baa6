/* Kinds of the reference box's channels (wire codes of PROTOCOL.md section 4). The pins
 * behind them are in boxes.h; edit both together when a box is wired differently. The
 * five-port box's build (make BOX=ports) takes channels_ports.c instead. */
#include "channels.h"

#ifndef BOX_PORTS

static const char input_codes[BOX_INPUTS][3] VP_FLASH = {
    "lp", /* 1 left lever switch */
    "lp", /* 2 right lever switch */
    "he", /* 3 magazine head-entry beam */
    "np", /* 4 left nose-poke beam */
    "np", /* 5 right nose-poke beam */
    "lk", /* 6 lickometer */
    "ps", /* 7 pellet sensor in the magazine */
    "np", /* 8 centre nose-poke beam */
};

static const char output_codes[BOX_OUTPUTS][3] VP_FLASH = {
    "lv", /* 1 left lever (extend) */
    "lv", /* 2 right lever (extend) */
    "cl", /* 3 left cue light */
    "cl", /* 4 right cue light */
    "hl", /* 5 house light */
    "tn", /* 6 tone generator gate */
    "fd", /* 7 pellet feeder */
    "sy", /* 8 sync TTL to other equipment */
    "av", /* 9 aversive (shock scrambler gate) */
    "cl", /* 10 magazine light */
};

const vp_channel_map box_channels = {BOX_INPUTS, BOX_OUTPUTS, input_codes, output_codes};

#endif
