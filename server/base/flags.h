// A small command-line parser shared by tickmark's programs, so every
// program has the same --flag=value / --flag value forms and a generated
// --help.
//
//   FlagSet flags("tickmarkd", "Runs the tickmark server.");
//   std::string listen = "127.0.0.1:7461";
//   flags.String("listen", &listen, "HOST:PORT to serve gRPC on");
//   if (auto r = flags.Parse(argc, argv); r != FlagSet::kOk) return r == FlagSet::kHelp ? 0 : 2;
//
// Not thread-safe; use from main().
#ifndef TICKMARK_SERVER_BASE_FLAGS_H_
#define TICKMARK_SERVER_BASE_FLAGS_H_

#include <functional>
#include <string>
#include <vector>

namespace tickmark {

class FlagSet {
 public:
  enum Result { kOk, kHelp, kError };

  FlagSet(std::string program, std::string summary);

  void String(const std::string& name, std::string* value, const std::string& help);
  void Int(const std::string& name, int64_t* value, const std::string& help);
  void Double(const std::string& name, double* value, const std::string& help);
  // --name sets true, --no-name or --name=false sets false.
  void Bool(const std::string& name, bool* value, const std::string& help);
  // Free text appended to --help (examples, notices).
  void Epilog(std::string text) { epilog_ = std::move(text); }

  // Parses argv[first..]; prints --help to stdout or errors to stderr.
  // Non-flag arguments are collected in args().
  Result Parse(int argc, char** argv, int first = 1);
  // True if the flag was given on the command line (so config files must
  // not override it).
  bool WasSet(const std::string& name) const;
  const std::vector<std::string>& args() const { return args_; }
  std::string Usage() const;

 private:
  struct Flag {
    std::string name;
    std::string help;
    std::string default_text;
    bool is_bool = false;
    std::function<bool(const std::string&)> set;  // false: bad value
    bool was_set = false;
  };
  Flag* Find(const std::string& name);

  std::string program_;
  std::string summary_;
  std::string epilog_;
  std::vector<Flag> flags_;
  std::vector<std::string> args_;
};

}  // namespace tickmark

#endif  // TICKMARK_SERVER_BASE_FLAGS_H_
