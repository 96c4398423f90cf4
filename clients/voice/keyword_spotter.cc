#include "clients/voice/keyword_spotter.h"

#include <pocketsphinx.h>
#include <unistd.h>

#include <algorithm>
#include <cmath>
#include <cstdio>
#include <cstdlib>
#include <filesystem>
#include <fstream>
#include <map>
#include <set>
#include <sstream>
#include <utility>

#include "clients/voice/sample_clock.h"

#ifndef TICKMARK_POCKETSPHINX_MODELDIR
#define TICKMARK_POCKETSPHINX_MODELDIR "/usr/share/pocketsphinx/model"
#endif

namespace tickmark::voice {
namespace {

constexpr int kSamplesPerFrame = kModelSampleRate / 100;  // -frate 100

bool Overlaps(int64_t a0, int64_t a1, int64_t b0, int64_t b1) { return a0 < b1 && b0 < a1; }

// Vowel phones of the CMU dictionary's phone set: one per syllable.
bool IsVowel(std::string_view phone) {
  static const std::set<std::string_view> kVowels = {"AA", "AE", "AH", "AO", "AW", "AY", "EH", "ER",
                                                     "EY", "IH", "IY", "OW", "OY", "UH", "UW"};
  return kVowels.count(phone) > 0;
}

// The syllables of each word's first pronunciation, for the words asked.
absl::StatusOr<std::map<std::string, int>> ReadDictionary(const std::string& path,
                                                          const std::set<std::string>& words) {
  std::ifstream in(path);
  if (!in) {
    return absl::NotFoundError("cannot read the pronunciation dictionary " + path +
                               " (Debian: apt-get install pocketsphinx-en-us)");
  }
  std::map<std::string, int> found;
  std::string line;
  while (std::getline(in, line)) {
    std::istringstream is(line);
    std::string word;
    if (!(is >> word) || words.count(word) == 0 || found.count(word) > 0) continue;
    int syllables = 0;
    std::string phone;
    while (is >> phone) syllables += IsVowel(phone) ? 1 : 0;
    found[word] = syllables;
  }
  return found;
}

}  // namespace

int32_t ThresholdScore(double threshold) {
  const int32_t log_ratio = static_cast<int32_t>(std::log(threshold) / std::log(1.0001));
  return (log_ratio >> 10) - 1500;
}

struct KeywordSpotter::Decoder {
  cmd_ln_t* config = nullptr;
  ps_decoder_t* ps = nullptr;
  int64_t base = 0;  // sample index of frame 0
  int64_t fed = 0;   // samples fed
  bool in_utterance = false;
  ~Decoder() {
    if (ps != nullptr) {
      if (in_utterance) ps_end_utt(ps);
      ps_free(ps);
    }
    if (config != nullptr) cmd_ln_free_r(config);
  }
};

std::string KeywordSpotter::DefaultModel() {
  return std::string(TICKMARK_POCKETSPHINX_MODELDIR) + "/en-us/en-us";
}
std::string KeywordSpotter::DefaultDictionary() {
  return std::string(TICKMARK_POCKETSPHINX_MODELDIR) + "/en-us/cmudict-en-us.dict";
}

KeywordSpotter::KeywordSpotter(const VoiceProfile& profile, SpotterOptions options)
    : phrases_(profile.phrases), settings_(profile.recogniser), options_(options) {
  model_ = settings_.model.empty() ? DefaultModel() : settings_.model;
  dictionary_ = settings_.dictionary.empty() ? DefaultDictionary() : settings_.dictionary;
  for (size_t i = 0; i < phrases_.size(); ++i) {
    threshold_scores_.push_back(ThresholdScore(phrases_[i].threshold));
    phrase_index_[phrases_[i].text] = i;
  }
}

KeywordSpotter::~KeywordSpotter() = default;

absl::StatusOr<std::unique_ptr<KeywordSpotter>> KeywordSpotter::Create(const VoiceProfile& profile,
                                                                       SpotterOptions options) {
  if (profile.phrases.empty()) return absl::InvalidArgumentError("the profile lists no phrase");
  std::unique_ptr<KeywordSpotter> s(new KeywordSpotter(profile, options));
  std::error_code ec;
  if (!std::filesystem::exists(std::filesystem::path(s->model_) / "mdef", ec)) {
    return absl::NotFoundError("no acoustic model in " + s->model_ +
                               " (Debian: apt-get install pocketsphinx-en-us)");
  }
  std::set<std::string> words;
  for (const Phrase& p : s->phrases_) {
    std::istringstream is(p.text);
    for (std::string w; is >> w;) words.insert(w);
  }
  auto dict = ReadDictionary(s->dictionary_, words);
  if (!dict.ok()) return dict.status();
  for (const Phrase& p : s->phrases_) {
    std::istringstream is(p.text);
    int syllables = 0;
    for (std::string w; is >> w;) {
      auto it = dict->find(w);
      if (it == dict->end()) {
        return absl::InvalidArgumentError("phrase \"" + p.text + "\": the word \"" + w +
                                          "\" is not in the dictionary " + s->dictionary_ +
                                          "; choose words it lists");
      }
      syllables += it->second;
    }
    if (syllables < 2) {
      s->warnings_.push_back("phrase \"" + p.text + "\" has " + std::to_string(syllables) +
                             " syllable: short words are missed often and heard in other "
                             "speech; phrases of 2-4 syllables work far better (docs/voice.md)");
    }
  }
  if (absl::Status st = s->StartDecoder(0); !st.ok()) return st;
  return s;
}

absl::Status KeywordSpotter::StartDecoder(int64_t base) {
  decoder_.reset();
  // The keyphrase list goes to pocketsphinx as a file: "phrase /threshold/".
  char path[] = "/tmp/tickmark-voice-kws-XXXXXX";
  const int fd = mkstemp(path);
  if (fd < 0) return absl::InternalError("cannot create a temporary keyphrase file in /tmp");
  std::string list;
  for (size_t i = 0; i < phrases_.size(); ++i) {
    char line[128];
    std::snprintf(line, sizeof line, "%s/%.6g/\n", phrases_[i].text.c_str(),
                  std::max(phrases_[i].threshold * options_.report_margin, 1e-300));
    list += line;
  }
  const bool written = write(fd, list.data(), list.size()) == static_cast<ssize_t>(list.size());
  close(fd);
  auto d = std::make_unique<Decoder>();
  if (written) {
    d->config = cmd_ln_init(nullptr, ps_args(), TRUE, "-hmm", model_.c_str(), "-dict",
                            dictionary_.c_str(), "-kws", path, "-remove_silence", "no", "-cmn",
                            "live", "-samprate", "16000", "-logfn", "/dev/null", nullptr);
    if (d->config != nullptr) d->ps = ps_init(d->config);
  }
  unlink(path);
  if (!written) return absl::InternalError("cannot write the temporary keyphrase file");
  if (d->ps == nullptr) {
    return absl::InternalError("the recogniser did not start (model " + model_ + ", dictionary " +
                               dictionary_ + ")");
  }
  if (ps_start_utt(d->ps) < 0) return absl::InternalError("the recogniser did not start listening");
  d->in_utterance = true;
  d->base = base;
  decoder_ = std::move(d);
  ++decoders_started_;
  return absl::OkStatus();
}

void KeywordSpotter::Collect() {
  ps_decoder_t* ps = decoder_->ps;
  const char* hyp = ps_get_hyp(ps, nullptr);
  if (hyp == nullptr || *hyp == 0) return;
  for (ps_seg_t* seg = ps_seg_iter(ps); seg != nullptr; seg = ps_seg_next(seg)) {
    int sf = 0, ef = 0;
    ps_seg_frames(seg, &sf, &ef);
    auto it = phrase_index_.find(ps_seg_word(seg));
    if (it == phrase_index_.end()) continue;
    Candidate c{it->second, decoder_->base + int64_t{sf} * kSamplesPerFrame,
                decoder_->base + int64_t{ef + 1} * kSamplesPerFrame,
                ps_seg_prob(seg, nullptr, nullptr, nullptr)};
    // Already final: the decoder keeps every detection of its utterance, and
    // the search may still move an alignment it reported.
    auto p = std::find_if(pending_.begin(), pending_.end(), [&](const Candidate& q) {
      return q.phrase == c.phrase && Overlaps(q.start, q.end, c.start, c.end);
    });
    if (p == pending_.end() && c.end <= settled_through_) continue;
    const bool done = std::any_of(recent_.begin(), recent_.end(), [&](const Heard& h) {
      return h.phrase == c.phrase && Overlaps(h.start, h.end, c.start, c.end);
    });
    if (done) continue;
    if (p == pending_.end()) {
      pending_.push_back(c);
    } else if (c.score >= p->score) {
      *p = c;
    }
  }
}

std::vector<Heard> KeywordSpotter::Settle(bool all) {
  const int64_t settle = Round(options_.settle_s * kModelSampleRate);
  const int64_t max_len = Round(settings_.max_phrase_s * kModelSampleRate);
  std::vector<Candidate> ready;
  for (auto it = pending_.begin(); it != pending_.end();) {
    if (all || next_index_ - it->end >= settle) {
      ready.push_back(*it);
      it = pending_.erase(it);
    } else {
      ++it;
    }
  }
  settled_through_ = all ? next_index_ : std::max(settled_through_, next_index_ - settle);
  std::sort(ready.begin(), ready.end(),
            [](const Candidate& a, const Candidate& b) { return a.start < b.start; });
  std::vector<Heard> out;
  for (const Candidate& c : ready) {
    Heard h;
    h.phrase = c.phrase;
    h.start = c.start;
    h.end = c.end;
    h.settled_at = next_index_;
    h.score = c.score;
    h.threshold_score = threshold_scores_[c.phrase];
    if (c.score < h.threshold_score) {
      h.rejected_because = "below its threshold";
    } else if (c.end - c.start > max_len) {
      h.rejected_because = "longer than max_phrase_s";
    }
    out.push_back(std::move(h));
  }
  // Overlapping accepted phrases are one utterance: the one furthest above
  // its threshold wins, also against those already reported.
  auto margin = [](const Heard& h) { return h.score - h.threshold_score; };
  for (Heard& h : out) {
    if (!h.rejected_because.empty()) continue;
    for (const Heard& r : recent_) {
      if (r.accepted && Overlaps(r.start, r.end, h.start, h.end)) {
        h.rejected_because = "overlaps \"" + phrases_[r.phrase].text + "\", heard before";
        break;
      }
    }
    if (!h.rejected_because.empty()) continue;
    for (const Heard& g : out) {
      if (&g == &h || !g.rejected_because.empty() || !Overlaps(g.start, g.end, h.start, h.end)) {
        continue;
      }
      if (margin(g) > margin(h) || (margin(g) == margin(h) && g.phrase < h.phrase)) {
        h.rejected_because = "overlaps \"" + phrases_[g.phrase].text + "\", which fits better";
        break;
      }
    }
  }
  for (Heard& h : out) {
    h.accepted = h.rejected_because.empty();
    recent_.push_back(h);
  }
  // Keep what a late alignment could still overlap.
  const int64_t keep = 10 * int64_t{kModelSampleRate};
  recent_.erase(std::remove_if(recent_.begin(), recent_.end(),
                               [&](const Heard& h) { return next_index_ - h.end > keep; }),
                recent_.end());
  return out;
}

std::vector<Heard> KeywordSpotter::Feed(int64_t first_index, std::span<const int16_t> samples,
                                        bool quiet) {
  std::vector<Heard> out;
  if (first_index != next_index_ || decoder_ == nullptr) {
    // A gap: what was heard before it is final; a fresh decoder starts here.
    if (decoder_ != nullptr) {
      Collect();
      out = Settle(true);
    }
    next_index_ = first_index;
    recent_.clear();
    if (!StartDecoder(first_index).ok()) {
      decoder_.reset();
      next_index_ = first_index + static_cast<int64_t>(samples.size());
      return out;
    }
  }
  const double age_s = static_cast<double>(next_index_ - decoder_->base) / kModelSampleRate;
  if ((age_s >= options_.restart_after_s && quiet && pending_.empty()) ||
      age_s >= options_.force_restart_after_s) {
    Collect();
    std::vector<Heard> last = Settle(true);
    out.insert(out.end(), last.begin(), last.end());
    if (!StartDecoder(next_index_).ok()) decoder_.reset();
    if (decoder_ == nullptr) {
      next_index_ += static_cast<int64_t>(samples.size());
      return out;
    }
  }
  if (!samples.empty()) {
    ps_process_raw(decoder_->ps, samples.data(), samples.size(), FALSE, FALSE);
    decoder_->fed += static_cast<int64_t>(samples.size());
    next_index_ += static_cast<int64_t>(samples.size());
  }
  Collect();
  std::vector<Heard> settled = Settle(false);
  out.insert(out.end(), settled.begin(), settled.end());
  return out;
}

std::vector<Heard> KeywordSpotter::Finish() {
  if (decoder_ == nullptr) return {};
  // Ending the utterance flushes the frames still held for the features'
  // context; a later Feed() starts a fresh decoder.
  ps_end_utt(decoder_->ps);
  decoder_->in_utterance = false;
  Collect();
  std::vector<Heard> out = Settle(true);
  decoder_.reset();
  return out;
}

}  // namespace tickmark::voice
