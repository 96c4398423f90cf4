#include "clients/voice/voice_profile.h"

#include <toml++/toml.h>

#include <algorithm>
#include <cmath>
#include <filesystem>
#include <fstream>
#include <map>
#include <sstream>
#include <utility>

#include "clients/keys/key_map.h"
#include "clients/keys/profile_toml.h"

namespace tickmark::voice {
namespace {

using keys::profile::Error;

absl::StatusOr<double> Number(std::string_view source, const toml::node& n,
                              const std::string& what) {
  if (n.is_integer()) return static_cast<double>(**n.as_integer());
  if (n.is_floating_point()) return **n.as_floating_point();
  return Error(source, n.source(), what + " must be a number");
}

absl::StatusOr<double> Threshold(std::string_view source, const toml::node& n,
                                 const std::string& ctx) {
  auto t = Number(source, n, ctx + "threshold");
  if (!t.ok()) return t.status();
  if (!std::isfinite(*t) || *t < kMinThreshold || *t > kMaxThreshold) {
    return Error(source, n.source(),
                 ctx +
                     "threshold must be within [1e-100, 1e+50] (e.g. 1e-20; smaller detects "
                     "more)");
  }
  return *t;
}

absl::Status ParseRecogniser(std::string_view source, const toml::node& node, RecogniserSettings* r,
                             double* default_threshold) {
  if (!node.is_table()) return Error(source, node.source(), "[recogniser] must be a table");
  for (const auto& [k, v] : *node.as_table()) {
    const std::string key(k.str());
    if (key == "model" || key == "dictionary") {
      if (!v.is_string() || v.as_string()->get().empty()) {
        return Error(source, v.source(), "recogniser." + key + " must be a non-empty string");
      }
      (key == "model" ? r->model : r->dictionary) = **v.as_string();
    } else if (key == "threshold") {
      auto t = Threshold(source, v, "recogniser.");
      if (!t.ok()) return t.status();
      *default_threshold = *t;
    } else if (key == "max_phrase_s") {
      auto d = Number(source, v, "recogniser.max_phrase_s");
      if (!d.ok()) return d.status();
      if (!(*d >= 0.3 && *d <= 10)) {
        return Error(source, v.source(), "recogniser.max_phrase_s must be within [0.3, 10]");
      }
      r->max_phrase_s = *d;
    } else {
      return Error(source, k.source(),
                   "unknown field \"recogniser." + key +
                       "\" (expected model, dictionary, threshold, max_phrase_s)");
    }
  }
  return absl::OkStatus();
}

}  // namespace

absl::StatusOr<std::string> NormalisePhrase(std::string_view text) {
  std::string out;
  bool space = false;
  for (char c : text) {
    if (c == ' ' || c == '\t') {
      space = !out.empty();
      continue;
    }
    const bool letter = (c >= 'a' && c <= 'z') || (c >= 'A' && c <= 'Z');
    if (!letter && c != '\'') {
      const unsigned char u = static_cast<unsigned char>(c);
      std::ostringstream os;
      if (u >= 0x20 && u < 0x7f) {
        os << "'" << c << "'";
      } else {
        os << "byte 0x" << std::hex << static_cast<int>(u);
      }
      return absl::InvalidArgumentError(
          "a phrase holds only letters, apostrophes and spaces, not " + os.str() +
          " (spell numbers out)");
    }
    if (space) out += ' ';
    space = false;
    out += static_cast<char>(c >= 'A' && c <= 'Z' ? c - 'A' + 'a' : c);
  }
  if (out.empty()) return absl::InvalidArgumentError("a phrase must hold at least one word");
  return out;
}

std::string VoiceProfile::Legend() const {
  // Phrases grouped by label, groups in falling value order.
  std::vector<std::pair<const Phrase*, std::string>> groups;
  for (const Phrase& p : phrases) {
    auto it = std::find_if(groups.begin(), groups.end(), [&](const auto& g) {
      return g.first->value == p.value && g.first->label == p.label;
    });
    if (it == groups.end()) {
      groups.push_back({&p, "\"" + p.text + "\""});
    } else {
      it->second += ", \"" + p.text + "\"";
    }
  }
  std::stable_sort(groups.begin(), groups.end(),
                   [](const auto& a, const auto& b) { return a.first->value > b.first->value; });
  std::string out;
  for (const auto& [p, texts] : groups) {
    if (!out.empty()) out += "  ";
    out += texts + " " + p->label;
  }
  return out;
}

absl::StatusOr<VoiceProfile> ParseVoiceProfile(std::string_view text,
                                               std::string_view source_name) {
  toml::table root;
  try {
    root = toml::parse(text, source_name);
  } catch (const toml::parse_error& e) {
    return Error(source_name, e.source(), std::string(e.description()));
  }
  VoiceProfile p;
  p.name = std::string(source_name);
  double default_threshold = kDefaultThreshold;
  for (const auto& [k, node] : root) {
    const std::string key(k.str());
    if (key == "name" || key == "description") {
      if (!node.is_string()) return Error(source_name, node.source(), key + " must be a string");
      (key == "name" ? p.name : p.description) = **node.as_string();
    } else if (key == "recogniser") {
      if (absl::Status s = ParseRecogniser(source_name, node, &p.recogniser, &default_threshold);
          !s.ok()) {
        return s;
      }
    } else if (key != "phrase") {
      return Error(
          source_name, k.source(),
          "unknown field \"" + key + "\" (expected name, description, [recogniser], [[phrase]])");
    }
  }
  const toml::node* phrases = root.get("phrase");
  if (phrases == nullptr || !phrases->is_array_of_tables() || phrases->as_array()->empty()) {
    return absl::InvalidArgumentError(std::string(source_name) +
                                      ": no [[phrase]] tables; give at least one phrase");
  }
  std::map<std::string, int64_t> first_line;
  int index = 0;
  for (const toml::node& entry : *phrases->as_array()) {
    ++index;
    const toml::table& t = *entry.as_table();
    const std::string ctx = "phrase " + std::to_string(index) + ": ";
    for (const auto& [k, v] : t) {
      const std::string field(k.str());
      if (field != "text" && field != "value" && field != "threshold" && field != "label") {
        return Error(
            source_name, k.source(),
            ctx + "unknown field \"" + field + "\" (expected text, value, threshold, label)");
      }
    }
    Phrase ph;
    const toml::node* tx = t.get("text");
    if (tx == nullptr || !tx->is_string()) {
      return Error(source_name, (tx != nullptr ? *tx : entry).source(),
                   ctx + "needs text = \"...\" (the words to listen for)");
    }
    auto norm = NormalisePhrase(**tx->as_string());
    if (!norm.ok())
      return Error(source_name, tx->source(), ctx + std::string(norm.status().message()));
    if (norm->size() > kMaxPhraseBytes) {
      return Error(source_name, tx->source(),
                   ctx + "\"" + *norm + "\" is longer than " + std::to_string(kMaxPhraseBytes) +
                       " characters (it travels in the feedback's 64-byte input label)");
    }
    ph.text = *norm;
    if (auto it = first_line.find(ph.text); it != first_line.end()) {
      return Error(
          source_name, tx->source(),
          ctx + "\"" + ph.text + "\" is already listed at line " + std::to_string(it->second));
    }
    first_line[ph.text] = tx->source().begin.line;
    const toml::node* value = t.get("value");
    if (value == nullptr) return Error(source_name, entry.source(), ctx + "needs a value");
    auto v = Number(source_name, *value, ctx + "value");
    if (!v.ok()) return v.status();
    if (!std::isfinite(*v) || std::fabs(*v) > keys::kMaxFeedbackMagnitude) {
      return Error(source_name, value->source(),
                   ctx + "value must be finite and within [-1000, 1000]");
    }
    ph.value = *v;
    ph.threshold = default_threshold;
    if (const toml::node* th = t.get("threshold"); th != nullptr) {
      auto parsed = Threshold(source_name, *th, ctx);
      if (!parsed.ok()) return parsed.status();
      ph.threshold = *parsed;
    }
    ph.label = keys::profile::FormatValue(ph.value);
    if (const toml::node* label = t.get("label"); label != nullptr) {
      if (!label->is_string())
        return Error(source_name, label->source(), ctx + "label must be a string");
      ph.label = **label->as_string();
    }
    p.phrases.push_back(std::move(ph));
  }
  return p;
}

absl::StatusOr<VoiceProfile> LoadVoiceProfile(const std::string& path) {
  std::ifstream in(path, std::ios::binary);
  if (!in) return absl::NotFoundError("cannot read profile " + path);
  std::stringstream ss;
  ss << in.rdbuf();
  auto p = ParseVoiceProfile(ss.str(), path);
  if (!p.ok()) return p;
  const std::filesystem::path folder = std::filesystem::path(path).parent_path();
  for (std::string* f : {&p->recogniser.model, &p->recogniser.dictionary}) {
    if (!f->empty() && std::filesystem::path(*f).is_relative()) *f = (folder / *f).string();
  }
  return p;
}

}  // namespace tickmark::voice
