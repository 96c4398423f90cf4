#include "clients/voice/audio_source.h"

#include <fcntl.h>
#include <poll.h>
#include <sys/stat.h>
#include <unistd.h>

#include <cerrno>
#include <cstring>

#include "clients/voice/keyword_spotter.h"
#include "clients/voice/wav.h"

namespace tickmark::voice {
namespace {

class StreamSource final : public AudioSource {
 public:
  StreamSource(StreamSourceOptions options, const MonotonicSource* clock, int fd)
      : options_(std::move(options)), clock_(clock), fd_(fd) {}
  ~StreamSource() override {
    if (fd_ > STDERR_FILENO) close(fd_);
  }

  absl::Status Open() {
    if (options_.format == StreamFormat::kRaw) {
      format_.channels = 1;
      format_.bits = 16;
      format_.sample_rate = kModelSampleRate;
    } else {
      while (true) {
        auto parsed = ParseWavHeader(buffer_);
        if (parsed.ok()) {
          format_ = *parsed;
          buffer_.erase(0, format_.data_offset);
          break;
        }
        if (!absl::IsOutOfRange(parsed.status())) {
          return absl::InvalidArgumentError(Name() + ": " + std::string(parsed.status().message()));
        }
        const ssize_t n = ReadSome(65536);
        if (n < 0) return absl::UnavailableError(Name() + ": " + std::strerror(errno));
        if (n == 0) {
          return absl::InvalidArgumentError(Name() + ": ends before its WAV header does" +
                                            (buffer_.empty() ? " (empty)" : ""));
        }
      }
      if (format_.sample_rate != kModelSampleRate) {
        return absl::InvalidArgumentError(
            Name() + ": " + format_.Describe() +
            "; the recogniser takes 16000 Hz (convert: sox IN -r 16000 -c 1 -b 16 OUT.wav)");
      }
    }
    if (options_.timing == StreamTiming::kEndsNow) {
      std::optional<uint64_t> bytes = format_.data_bytes;
      struct stat st {};
      if (!bytes && fstat(fd_, &st) == 0 && S_ISREG(st.st_mode)) {
        const uint64_t header = options_.format == StreamFormat::kWav ? format_.data_offset : 0;
        if (static_cast<uint64_t>(st.st_size) >= header) bytes = st.st_size - header;
      }
      if (!bytes) {
        return absl::InvalidArgumentError(
            Name() +
            ": its length is unknown, so \"--audio-start ends-now\" cannot place it; "
            "give --audio-start MONO_NS or live");
      }
      const int64_t frames = static_cast<int64_t>(*bytes / format_.frame_bytes());
      start_ns_ = clock_->NowNanos() - frames * 1'000'000'000 / kModelSampleRate;
    } else if (options_.timing == StreamTiming::kDeclared) {
      start_ns_ = options_.start_ns;
    }
    return absl::OkStatus();
  }

  absl::StatusOr<AudioBlock> Read(int timeout_ms) override {
    AudioBlock b;
    b.first_index = next_index_;
    if (eof_) {
      b.end = true;
      return b;
    }
    const size_t want = options_.block_samples * format_.frame_bytes();
    while (buffer_.size() < want && !eof_) {
      pollfd p{fd_, POLLIN, 0};
      const int ready = poll(&p, 1, timeout_ms);
      if (ready < 0 && errno == EINTR) continue;
      if (ready < 0) return absl::UnavailableError(Name() + ": " + std::strerror(errno));
      if (ready == 0) break;  // nothing more in time: hand over what there is
      const ssize_t n = ReadSome(want - buffer_.size());
      if (n < 0) {
        if (errno == EINTR || errno == EAGAIN) continue;
        return absl::UnavailableError(Name() + ": " + std::strerror(errno));
      }
      if (n == 0) eof_ = true;
      if (options_.timing == StreamTiming::kLive) break;  // stamp each read as it comes
    }
    size_t usable = buffer_.size();
    if (format_.data_bytes) {
      const uint64_t left = *format_.data_bytes - consumed_;
      if (usable >= left) {
        usable = static_cast<size_t>(left);
        eof_ = true;  // what follows the data chunk is not audio
      }
    }
    const size_t used =
        AppendMono16(format_, std::string_view(buffer_).substr(0, usable), &b.samples);
    buffer_.erase(0, eof_ ? buffer_.size() : used);
    consumed_ += used;
    next_index_ += static_cast<int64_t>(b.samples.size());
    if (options_.timing == StreamTiming::kLive && !b.samples.empty()) {
      b.timing.emplace_back(next_index_ - 1, clock_->NowNanos());
    }
    b.end = eof_;
    return b;
  }

  std::string Describe() const override {
    return (options_.format == StreamFormat::kWav ? "WAV " : "raw PCM ") + Name();
  }
  bool live() const override { return options_.timing == StreamTiming::kLive; }
  std::optional<int64_t> declared_start_ns() const override { return start_ns_; }

 private:
  std::string Name() const { return options_.path == "-" ? "stdin" : options_.path; }
  ssize_t ReadSome(size_t max) {
    char buf[65536];
    const ssize_t n = read(fd_, buf, std::min(max, sizeof buf));
    if (n > 0) buffer_.append(buf, static_cast<size_t>(n));
    return n;
  }

  StreamSourceOptions options_;
  const MonotonicSource* clock_;
  int fd_;
  WavFormat format_;
  std::string buffer_;     // bytes read, not yet converted
  uint64_t consumed_ = 0;  // data bytes converted
  int64_t next_index_ = 0;
  bool eof_ = false;
  std::optional<int64_t> start_ns_;
};

}  // namespace

absl::StatusOr<std::unique_ptr<AudioSource>> OpenStreamSource(StreamSourceOptions options,
                                                              const MonotonicSource* clock) {
  int fd = STDIN_FILENO;
  if (options.path != "-") {
    fd = open(options.path.c_str(), O_RDONLY | O_CLOEXEC);
    if (fd < 0) {
      return absl::NotFoundError("cannot open " + options.path + ": " + std::strerror(errno));
    }
  }
  auto source = std::make_unique<StreamSource>(std::move(options), clock, fd);
  if (absl::Status s = source->Open(); !s.ok()) return s;
  return std::unique_ptr<AudioSource>(std::move(source));
}

}  // namespace tickmark::voice
