#include "server/base/flags.h"

#include <algorithm>
#include <charconv>
#include <iostream>
#include <map>
#include <memory>
#include <sstream>

#include <toml++/toml.h>

#include "tickmark/version.h"

namespace tickmark {
namespace {

// Reads a TOML config for CLI11: one ConfigItem per top-level key. Keys are
// checked against the app here, so an unknown key is reported with its line
// before any value is applied. Remembers where each key came from, so value
// errors that CLI11 reports by flag name can be traced back to the file.
class TomlConfig : public CLI::Config {
 public:
  explicit TomlConfig(const CLI::App* app) : app_(app) {}

  // The settings in force (given, else default) as a config file this
  // class reads back; for --print-config.
  std::string to_config(const CLI::App* app, bool, bool, std::string) const override {
    std::string out;
    for (const CLI::Option* option : app->get_options()) {
      const std::string name = option->get_single_name();
      if (!option->get_configurable() || option->get_lnames().empty() || name == "help" ||
          name == "print-config") {
        continue;
      }
      std::string value;
      if (option->count() > 0) {
        value = option->results().empty() ? "" : option->results().back();
      } else {
        value = option->get_default_str();
      }
      if (value.empty() && option->get_expected_min() == 0) value = "false";
      out += name + " = " + TomlValue(value) + "\n";
    }
    return out;
  }

  std::vector<CLI::ConfigItem> from_config(std::istream& in) const override {
    const std::string path = Path();
    keys_.clear();
    toml::table table;
    try {
      table = toml::parse(in, path);
    } catch (const toml::parse_error& e) {
      throw CLI::ConfigError(path + ":" + std::to_string(e.source().begin.line) + ": " +
                             std::string(e.description()));
    }
    std::vector<CLI::ConfigItem> result;
    for (const auto& [key_node, node] : table) {
      const std::string key(key_node.str());
      const std::string where = path + ":" + std::to_string(node.source().begin.line);
      if (node.is_table()) {
        throw CLI::ConfigError(where + ": section [" + key +
                               "] is not used: keys are the long flag names, at top level");
      }
      const CLI::Option* option = app_->get_option_no_throw("--" + key);
      if (option == nullptr || !option->get_configurable() || key == "help") {
        std::string hint;
        std::string dashed = key;
        std::replace(dashed.begin(), dashed.end(), '_', '-');
        if (dashed != key && app_->get_option_no_throw("--" + dashed) != nullptr) {
          hint = " (did you mean '" + dashed + "'?)";
        }
        throw CLI::ConfigError(where + ": unknown key '" + key + "'" + hint + "; keys are " +
                               app_->get_name() + "'s long flag names");
      }
      CLI::ConfigItem item;
      item.name = key;
      if (const toml::array* array = node.as_array()) {
        for (const toml::node& element : *array) item.inputs.push_back(Scalar(element, where, key));
      } else {
        item.inputs.push_back(Scalar(node, where, key));
      }
      keys_[key] = where;
      result.push_back(std::move(item));
    }
    return result;
  }

  // "FILE:LINE" of `key` if the last file read set it, else empty.
  std::string Where(const std::string& key) const {
    auto it = keys_.find(key);
    return it == keys_.end() ? "" : it->second;
  }
  const std::map<std::string, std::string>& keys() const { return keys_; }

 private:
  std::string Path() const {
    const CLI::Option* config = app_->get_config_ptr();
    return config != nullptr && config->count() > 0 ? config->as<std::string>() : "config";
  }

  // A TOML value as the text CLI11 converts, as if given on the command line.
  static std::string Scalar(const toml::node& node, const std::string& where,
                            const std::string& key) {
    if (auto s = node.value_exact<std::string>()) return *s;
    if (auto b = node.value_exact<bool>()) return *b ? "true" : "false";
    if (auto i = node.value_exact<int64_t>()) return std::to_string(*i);
    if (auto d = node.value_exact<double>()) {
      char buf[32];
      auto [end, ec] = std::to_chars(buf, buf + sizeof buf, *d);
      return std::string(buf, end);
    }
    throw CLI::ConfigError(where + ": key '" + key +
                           "': value must be a string, number or boolean");
  }

  // Numbers and booleans bare, anything else as a TOML basic string.
  static std::string TomlValue(const std::string& v) {
    if (v == "true" || v == "false") return v;
    double number = 0;
    auto [end, ec] = std::from_chars(v.data(), v.data() + v.size(), number);
    if (!v.empty() && ec == std::errc() && end == v.data() + v.size()) return v;
    std::string quoted = "\"";
    for (char c : v) {
      if (c == '"' || c == '\\') quoted += '\\';
      quoted += c;
    }
    return quoted + "\"";
  }

  const CLI::App* app_;
  mutable std::map<std::string, std::string> keys_;  // key -> "FILE:LINE"
};

// CLI11's help layout with the value's type in the left column and its
// range, choices and default after the description, wrapped to 80 columns,
// so every program's --help reads the same.
class Layout : public CLI::Formatter {
 public:
  static constexpr size_t kColumn = 30;
  static constexpr size_t kWidth = 80;

  Layout() { column_width(kColumn); }

  std::string make_option_opts(const CLI::Option* opt) const override {
    if (!opt->get_option_text().empty()) return " " + opt->get_option_text();
    if (opt->get_type_size() == 0) return "";
    const std::string type = opt->get_type_name();
    const std::string word = type.substr(0, type.find(':'));
    return word.empty() ? "" : " " + word;
  }

  std::string make_option_desc(const CLI::Option* opt) const override {
    std::vector<std::string> notes;
    const std::string type = opt->get_type_name();
    if (size_t colon = type.find(':'); colon != std::string::npos) {
      std::string check = type.substr(colon + 1);
      const std::string word = type.substr(0, colon) + " ";
      if (check.rfind(word, 0) == 0) check = check.substr(word.size());  // "INT in [1 - 9]"
      if (!check.empty() && check.front() == '{') check = "one of " + check;
      if (!check.empty()) notes.push_back(check);
    }
    if (opt->get_required()) notes.push_back("required");
    if (opt->get_type_size() != 0 && !opt->get_default_str().empty()) {
      notes.push_back("default " + opt->get_default_str());
    }
    std::string text = opt->get_description();
    for (size_t i = 0; i < notes.size(); ++i) text += (i == 0 ? " (" : "; ") + notes[i];
    if (!notes.empty()) text += ")";
    return Wrap(text, kWidth - kColumn);
  }

  std::string make_subcommand(const CLI::App* sub) const override {
    std::stringstream out;
    CLI::detail::format_help(out, sub->get_display_name(true),
                             Wrap(sub->get_description(), kWidth - kColumn), kColumn);
    return out.str();
  }

  std::string make_description(const CLI::App* app) const override {
    const std::string text = app->get_description();
    return text.empty() ? "" : Wrap(text, kWidth) + "\n";
  }

 private:
  // Breaks each line of `text` at spaces into lines of at most `width`
  // (longer words stay whole); CLI11 indents each new line to the
  // description column.
  static std::string Wrap(const std::string& text, size_t width) {
    std::string out;
    std::istringstream lines(text);
    bool first_line = true;
    for (std::string paragraph; std::getline(lines, paragraph);) {
      if (!first_line) out += '\n';
      first_line = false;
      size_t line = 0;
      std::istringstream words(paragraph);
      for (std::string word; words >> word;) {
        if (line > 0 && line + 1 + word.size() > width) {
          out += '\n';
          line = 0;
        } else if (line > 0) {
          out += ' ';
          ++line;
        }
        out += word;
        line += word.size();
      }
    }
    return out;
  }
};

// True if "--NAME" appears in `text` as a whole flag name.
bool MentionsFlag(const std::string& text, const std::string& name) {
  const std::string flag = "--" + name;
  for (size_t at = text.find(flag); at != std::string::npos; at = text.find(flag, at + 1)) {
    const size_t after = at + flag.size();
    if (after == text.size()) return true;
    const char c = text[after];
    if (!(std::isalnum(static_cast<unsigned char>(c)) || c == '-' || c == '_')) return true;
  }
  return false;
}

bool GivenOnCommandLine(const std::vector<std::string>& args, const std::string& name) {
  const std::string flag = "--" + name;
  for (const std::string& a : args) {
    if (a == flag || a.rfind(flag + "=", 0) == 0) return true;
  }
  return false;
}

// CLI11 names the flag; when the value came from the config file, name the
// file, line and key instead, which is what the operator has to edit.
std::string Describe(const CLI::App& app, const CLI::ParseError& e,
                     const std::vector<std::string>& args) {
  std::string message = e.what();
  auto config = std::dynamic_pointer_cast<TomlConfig>(app.get_config_formatter());
  if (config != nullptr && dynamic_cast<const CLI::ConfigError*>(&e) == nullptr) {
    for (const auto& [key, where] : config->keys()) {
      if (MentionsFlag(message, key) && !GivenOnCommandLine(args, key)) {
        return where + ": key '" + key + "': " + message;
      }
    }
  }
  if (dynamic_cast<const CLI::FileError*>(&e) != nullptr) return "--config: " + message;
  return message;
}

// The program's full name, "tickmark session create" for a subcommand.
std::string ProgramName(const CLI::App& app) {
  const CLI::App* root = &app;
  while (root->get_parent() != nullptr) root = root->get_parent();
  return root->get_name();
}

}  // namespace

void ConfigureApp(CLI::App& app, const std::string& footer) {
  app.option_defaults()->always_capture_default();
  app.formatter(std::make_shared<Layout>());
  app.set_help_flag("-h,--help", "print this help and exit");
  if (app.get_parent() == nullptr) AddVersionFlag(app);
  if (!footer.empty()) app.footer(footer);
}

std::string VersionLine(const std::string& program) {
  return program + " " + TICKMARK_VERSION + " (wire contract " + TICKMARK_CONTRACT_PACKAGE + " " +
         TICKMARK_CONTRACT_VERSION + ")";
}

CLI::Option* AddVersionFlag(CLI::App& app) {
  const std::string line = VersionLine(ProgramName(app));
  return app.set_version_flag("--version", line, "print the version and exit");
}

ParseResult ParseArgs(CLI::App& app, const std::vector<std::string>& args, std::string* text) {
  // CLI11 reads "--flag=" as "--flag" and would take the next argument as
  // its value; an explicit empty value is meant.
  std::vector<std::string> split;
  bool options_end = false;
  for (const std::string& a : args) {
    options_end = options_end || a == "--";
    if (!options_end && a.size() > 3 && a.rfind("--", 0) == 0 && a.find('=') == a.size() - 1) {
      split.push_back(a.substr(0, a.size() - 1));
      split.push_back("");
    } else {
      split.push_back(a);
    }
  }
  std::vector<std::string> reversed(split.rbegin(), split.rend());  // CLI11 wants them backwards
  try {
    app.parse(reversed);
  } catch (const CLI::CallForHelp&) {
    *text = app.help();
    return ParseResult::kHelp;
  } catch (const CLI::CallForVersion& e) {
    *text = std::string(e.what()) + "\n";
    return ParseResult::kHelp;
  } catch (const CLI::CallForAllHelp&) {
    *text = app.help("", CLI::AppFormatMode::All);
    return ParseResult::kHelp;
  } catch (const CLI::ParseError& e) {
    *text = Describe(app, e, args);
    return ParseResult::kError;
  }
  if (const CLI::Option* print = app.get_option_no_throw("--print-config");
      print != nullptr && print->count() > 0) {
    *text = app.config_to_str(true, false);
    return ParseResult::kHelp;
  }
  return ParseResult::kRun;
}

std::optional<int> ParseCommandLine(CLI::App& app, int argc, char** argv) {
  std::vector<std::string> args(argv + 1, argv + argc);
  std::string text;
  switch (ParseArgs(app, args, &text)) {
    case ParseResult::kRun:
      return std::nullopt;
    case ParseResult::kHelp:
      std::cout << text;
      return 0;
    case ParseResult::kError:
      break;
  }
  const std::string program = ProgramName(app);
  std::cerr << program << ": " << text << " (see " << program << " --help)\n";
  return kExitUsage;
}

CLI::Validator Between(double lo, double hi) {
  auto text = [](double v) {
    char buf[32];
    auto [end, ec] = std::to_chars(buf, buf + sizeof buf, v);
    return std::string(buf, end);
  };
  const std::string range = "in [" + text(lo) + ", " + text(hi) + "]";
  return CLI::Validator(
      [lo, hi, range](std::string& input) {
        double v = 0;
        auto [end, ec] = std::from_chars(input.data(), input.data() + input.size(), v);
        if (ec != std::errc() || end != input.data() + input.size()) {
          return "'" + input + "' is not a number";
        }
        return v >= lo && v <= hi ? std::string() : input + " is not " + range;
      },
      range);
}

CLI::Option* AddTomlConfig(CLI::App& app, const std::string& help) {
  CLI::Option* option = app.set_config("--config", "", help);
  option->type_name("FILE");
  app.config_formatter(std::make_shared<TomlConfig>(&app));
  app.allow_config_extras(CLI::config_extras_mode::error);
  app.add_flag("--print-config")
      ->description(
          "print the settings in force (flags, config file, defaults) as a config file and exit")
      ->configurable(false);
  return option;
}

}  // namespace tickmark
