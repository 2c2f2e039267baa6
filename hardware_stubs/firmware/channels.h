/* The box's channel map: which kind of hardware sits on each channel (channels.c for the
 * reference box, channels_ports.c for the five-port box; counts and pins in boxes.h). */
#ifndef CHANNELS_H
#define CHANNELS_H

#include "boxes.h"
#include "vproto.h"

extern const vp_channel_map box_channels;

#endif
