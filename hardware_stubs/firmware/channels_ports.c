/* Kinds of the five-port box's channels (wire codes of PROTOCOL.md section 4): centre poke
 * to start, four lit side ports, magazine. Pins in boxes.h; built by make BOX=ports. */
#include "channels.h"

#ifdef BOX_PORTS

static const char input_codes[BOX_INPUTS][3] VP_FLASH = {
    "np", /* 1 centre nose-poke beam */
    "np", /* 2 west nose-poke beam */
    "np", /* 3 east nose-poke beam */
    "np", /* 4 north nose-poke beam */
    "np", /* 5 south nose-poke beam */
    "he", /* 6 magazine head-entry beam */
    "ps", /* 7 pellet sensor in the magazine */
};

static const char output_codes[BOX_OUTPUTS][3] VP_FLASH = {
    "cl", /* 1 centre port light */
    "cl", /* 2 west port light */
    "cl", /* 3 east port light */
    "cl", /* 4 north port light */
    "cl", /* 5 south port light */
    "hl", /* 6 house light */
    "fd", /* 7 pellet feeder */
    "sy", /* 8 sync TTL to other equipment */
    "cl", /* 9 magazine light */
    "tn", /* 10 tone generator gate */
};

const vp_channel_map box_channels = {BOX_INPUTS, BOX_OUTPUTS, input_codes, output_codes};

#endif
