// ALSA capture for tickmark-voice: a capture device opened at 16 kHz mono,
// 16-bit (a "plug" device such as "default" converts from what the hardware
// has), read by its own thread so that recognition never delays capture.
//
// Timing: the device's timestamps are put on CLOCK_MONOTONIC
// (snd_pcm_sw_params_set_tstamp_type ... MONOTONIC, tstamp mode ENABLE).
// After every read, snd_pcm_status() gives the timestamp of the last
// capture-pointer update and the frames available then, so
// (frames read + available - 1, timestamp) is "that sample had been captured
// by then" — a timing pair for SampleClock, late only by the card's FIFO and
// converter delay (well under a millisecond, from memory). If a device's
// timestamps are not monotonic (0, or far from the clock), read times are
// used instead and a note says so.
//
// An overrun (the reader fell behind the buffer) loses audio: the capture
// restarts and the next block is marked as a gap. A device that disappears
// (unplugged) is reopened every second until it comes back.
//
// Thread-safety: Read() from one thread; the capture thread is internal.
#ifndef TICKMARK_CLIENTS_VOICE_ALSA_SOURCE_H_
#define TICKMARK_CLIENTS_VOICE_ALSA_SOURCE_H_

#include <memory>
#include <string>

#include "absl/status/statusor.h"
#include "clients/voice/audio_source.h"
#include "server/core/time.h"

namespace tickmark::voice {

struct AlsaOptions {
  std::string device = "default";
  unsigned period_us = 20'000;
  unsigned buffer_us = 2'000'000;
};

// Opens the device (errors name it, and what ALSA said) and starts capture.
// `clock` must be CLOCK_MONOTONIC's (SystemMonotonic), not owned.
absl::StatusOr<std::unique_ptr<AudioSource>> OpenAlsaSource(AlsaOptions options,
                                                            const MonotonicSource* clock);

// The capture devices ALSA knows (name and description), one per line.
std::string ListAlsaCaptureDevices();

}  // namespace tickmark::voice

#endif  // TICKMARK_CLIENTS_VOICE_ALSA_SOURCE_H_
