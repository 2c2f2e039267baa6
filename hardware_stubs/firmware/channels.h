/* The reference box's channel map: which kind of hardware sits on each channel. */
#ifndef CHANNELS_H
#define CHANNELS_H

#include "vproto.h"

#define BOX_INPUTS 8u
#define BOX_OUTPUTS 10u

extern const vp_channel_map box_channels;

#endif
