#include "server/base/flags.h"

#include <cerrno>
#include <cstdio>
#include <cstdlib>
#include <iostream>
#include <sstream>

namespace tickmark {

FlagSet::FlagSet(std::string program, std::string summary)
    : program_(std::move(program)), summary_(std::move(summary)) {}

void FlagSet::String(const std::string& name, std::string* value, const std::string& help) {
  flags_.push_back({name, help, value->empty() ? "" : "\"" + *value + "\"", false,
                    [value](const std::string& v) {
                      *value = v;
                      return true;
                    }});
}

void FlagSet::Int(const std::string& name, int64_t* value, const std::string& help) {
  flags_.push_back({name, help, std::to_string(*value), false, [value](const std::string& v) {
                      char* end = nullptr;
                      errno = 0;
                      long long x = std::strtoll(v.c_str(), &end, 10);
                      if (v.empty() || *end != '\0' || errno != 0) return false;
                      *value = x;
                      return true;
                    }});
}

void FlagSet::Double(const std::string& name, double* value, const std::string& help) {
  std::ostringstream def;
  def << *value;
  flags_.push_back({name, help, def.str(), false, [value](const std::string& v) {
                      char* end = nullptr;
                      double x = std::strtod(v.c_str(), &end);
                      if (v.empty() || *end != '\0') return false;
                      *value = x;
                      return true;
                    }});
}

void FlagSet::Bool(const std::string& name, bool* value, const std::string& help) {
  flags_.push_back({name, help, *value ? "true" : "", true, [value](const std::string& v) {
                      if (v == "true" || v == "1" || v == "yes") {
                        *value = true;
                      } else if (v == "false" || v == "0" || v == "no") {
                        *value = false;
                      } else {
                        return false;
                      }
                      return true;
                    }});
}

FlagSet::Flag* FlagSet::Find(const std::string& name) {
  for (Flag& f : flags_) {
    if (f.name == name) return &f;
  }
  return nullptr;
}

bool FlagSet::WasSet(const std::string& name) const {
  for (const Flag& f : flags_) {
    if (f.name == name) return f.was_set;
  }
  return false;
}

std::string FlagSet::Usage() const {
  std::ostringstream out;
  out << "usage: " << program_ << " [flags]\n\n" << summary_ << "\n\nflags:\n";
  for (const Flag& f : flags_) {
    std::string head = "  --" + f.name + (f.is_bool ? "" : "=VALUE");
    out << head;
    out << std::string(head.size() < 30 ? 30 - head.size() : 1, ' ') << f.help;
    if (!f.default_text.empty()) out << " (default " << f.default_text << ")";
    out << "\n";
  }
  out << "  --help                      show this help and exit\n";
  if (!epilog_.empty()) out << "\n" << epilog_ << "\n";
  return out.str();
}

FlagSet::Result FlagSet::Parse(int argc, char** argv, int first) {
  for (int i = first; i < argc; ++i) {
    std::string arg = argv[i];
    if (arg == "--help" || arg == "-h") {
      std::cout << Usage();
      return kHelp;
    }
    if (arg == "--") {
      for (++i; i < argc; ++i) args_.push_back(argv[i]);
      break;
    }
    if (arg.rfind("--", 0) != 0 || arg.size() == 2) {
      args_.push_back(arg);
      continue;
    }
    std::string name = arg.substr(2), value;
    bool has_value = false;
    if (auto eq = name.find('='); eq != std::string::npos) {
      value = name.substr(eq + 1);
      name = name.substr(0, eq);
      has_value = true;
    }
    Flag* f = Find(name);
    if (f == nullptr && name.rfind("no-", 0) == 0) {
      Flag* b = Find(name.substr(3));
      if (b != nullptr && b->is_bool && !has_value) {
        b->set("false");
        b->was_set = true;
        continue;
      }
    }
    if (f == nullptr) {
      std::cerr << program_ << ": unknown flag --" << name << " (see --help)\n";
      return kError;
    }
    if (!has_value) {
      if (f->is_bool) {
        value = "true";
      } else if (i + 1 < argc) {
        value = argv[++i];
      } else {
        std::cerr << program_ << ": --" << name << " needs a value\n";
        return kError;
      }
    }
    if (!f->set(value)) {
      std::cerr << program_ << ": bad value '" << value << "' for --" << name << "\n";
      return kError;
    }
    f->was_set = true;
  }
  return kOk;
}

}  // namespace tickmark
