// --keep-audio DIR: the only way tickmark-voice writes audio anywhere.
// Without it no sample leaves the process: not to disk, not to the server.
//
// With it, each detection's window (from shortly before the onset to
// shortly after the phrase) is written as a mono 16-bit WAV file, and only
// the file's SHA-256 travels with the feedback (FeedbackMessage.audio_sha256,
// stored in the ledger's record), so the ledger can later prove which file
// belongs to which feedback without holding any audio. Files are named by
// the feedback's client sequence, which is known only once the server has
// numbered and stored it: a file is written as pending-<first 16 hex digits
// of its SHA-256>.wav, renamed to feedback-<client sequence>.wav when its
// feedback is acknowledged, or rejected-<client sequence>.wav when the
// server refused it (then the ledger holds nothing about it). Files of
// feedback still unacknowledged at exit keep their pending name.
// The folder is created 0700 and the files 0600: they hold a person's voice.
//
// Thread-safe: Keep() runs on the audio thread, the ack callbacks on the
// stream client's.
#ifndef TICKMARK_CLIENTS_VOICE_KEEP_AUDIO_H_
#define TICKMARK_CLIENTS_VOICE_KEEP_AUDIO_H_

#include <cstdint>
#include <map>
#include <memory>
#include <mutex>
#include <span>
#include <string>
#include <string_view>
#include <vector>

#include "absl/status/statusor.h"

namespace tickmark::voice {

// The SHA-256 of `bytes`, 32 raw bytes (OpenSSL).
std::string Sha256(std::string_view bytes);
std::string Hex(std::string_view bytes);

class AudioKeeper {
 public:
  // Creates `dir` (0700) when missing; FAILED_PRECONDITION when it cannot be
  // created or written.
  static absl::StatusOr<std::unique_ptr<AudioKeeper>> Open(const std::string& dir);

  // Writes the samples as pending-<hash>.wav; returns the file's SHA-256
  // (32 raw bytes).
  absl::StatusOr<std::string> Keep(std::span<const int16_t> samples, uint32_t sample_rate);
  // Renames the pending file with that hash; returns the new path.
  absl::StatusOr<std::string> Acknowledged(const std::string& sha256, uint64_t client_sequence);
  absl::StatusOr<std::string> Rejected(const std::string& sha256, uint64_t client_sequence);
  // Paths still pending.
  std::vector<std::string> Pending() const;
  const std::string& dir() const { return dir_; }

 private:
  explicit AudioKeeper(std::string dir) : dir_(std::move(dir)) {}
  absl::StatusOr<std::string> Rename(const std::string& sha256, const std::string& name);

  std::string dir_;
  mutable std::mutex mu_;
  std::map<std::string, std::string> pending_;  // sha256 -> path; guarded by mu_
};

}  // namespace tickmark::voice

#endif  // TICKMARK_CLIENTS_VOICE_KEEP_AUDIO_H_
