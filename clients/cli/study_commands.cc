// tickmark study create|list|show|condition|enroll|schedule (docs/studies.md).
#include <iomanip>
#include <iostream>
#include <map>
#include <memory>
#include <sstream>
#include <string>
#include <vector>

#include "clients/cli/commands.h"
#include "clients/cli/output.h"

namespace tickmark::cli {
namespace {

namespace v1 = tickmark::v1;
using Admin = v1::SessionAdmin::Stub;

std::string Join(const google::protobuf::RepeatedPtrField<std::string>& items,
                 const char* sep = ", ") {
  std::string out;
  for (const std::string& s : items) out += (out.empty() ? "" : sep) + s;
  return out;
}

std::string ConditionLine(const v1::StudyCondition& c) {
  std::ostringstream out;
  out << c.name() << ": kernel "
      << (c.default_kernel().empty() ? "(server default)" : c.default_kernel());
  if (c.pin_kernels()) out << ", kernels pinned";
  if (c.allowed_lateness_ns() > 0)
    out << ", allowed lateness " << FormatMillis(c.allowed_lateness_ns());
  if (!c.feedback_values().empty()) {
    out << ", values";
    for (double v : c.feedback_values()) out << " " << v;
  }
  if (!c.notes().empty()) out << " — " << c.notes();
  return out.str();
}

std::string Hex(const std::string& bytes) {
  static const char* kDigits = "0123456789abcdef";
  std::string out;
  for (unsigned char b : bytes) {
    out += kDigits[b >> 4];
    out += kDigits[b & 15];
  }
  return out;
}

void PrintSchedule(const v1::Study& s) {
  if (!s.has_schedule()) {
    std::cout << "schedule     none (tickmark study schedule " << s.id() << ")\n";
    return;
  }
  const auto& sc = s.schedule();
  std::cout << "schedule     " << sc.design() << ", " << sc.rows_size() << " orders\n";
  for (int i = 0; i < sc.rows_size(); ++i) {
    std::cout << "  order " << std::setw(2) << i + 1 << "  "
              << Join(sc.rows(i).conditions(), " -> ") << "\n";
  }
  // Each participant's order, with the conditions that have a session already.
  std::map<std::string, std::map<std::string, std::string>>
      done;  // participant -> condition -> session
  for (const auto& e : s.sessions()) {
    for (const std::string& p : e.participants()) done[p][e.condition()] = e.session_id();
  }
  for (const std::string& p : s.participants()) {
    auto it = sc.assignment().find(p);
    if (it == sc.assignment().end() || static_cast<int>(it->second) >= sc.rows_size()) continue;
    std::cout << "  " << std::left << std::setw(14) << p << std::right << "order " << it->second + 1
              << ":";
    for (const std::string& c : sc.rows(static_cast<int>(it->second)).conditions()) {
      auto d = done[p].find(c);
      std::cout << " " << c << (d == done[p].end() ? "" : "[" + d->second + "]");
    }
    std::cout << "\n";
  }
}

int PrintStudy(const v1::Study& s) {
  std::cout << "study        " << s.id() << "\n"
            << "name         " << s.name() << "\n";
  if (!s.description().empty()) std::cout << "description  " << s.description() << "\n";
  std::cout << "created      " << FormatUtc(s.created_session_ns()) << "\n"
            << "journal      " << s.last_sequence() << " records, head "
            << Hex(s.head_hash()).substr(0, 16) << "\n"
            << "conditions   " << s.conditions_size() << "\n";
  for (const auto& c : s.conditions()) std::cout << "  " << ConditionLine(c) << "\n";
  std::cout << "participants " << s.participants_size()
            << (s.participants().empty() ? "" : " (" + Join(s.participants()) + ")") << "\n";
  PrintSchedule(s);
  std::cout << "sessions     " << s.sessions_size() << "\n";
  for (const auto& e : s.sessions()) {
    std::cout << "  " << e.session_id() << "  " << std::left << std::setw(12) << e.condition()
              << std::right << " " << Join(e.participants()) << "  "
              << FormatUtc(e.created_session_ns()) << "\n";
  }
  return kExitOk;
}

template <typename Request>
int CallStudy(CommandTable& table,
              grpc::Status (Admin::*method)(grpc::ClientContext*, const Request&, v1::Study*),
              const Request& req, const char* what) {
  return CallAdmin<Request, v1::Study>(table.common(), method, req, [what](const v1::Study& s) {
    if (what != nullptr) std::cout << what << "\n";
    return PrintStudy(s);
  });
}

// "-1,1" or "-1, -0.5, 0.5, 1" -> numbers; false on a bad one.
bool ParseValues(const std::string& text, v1::StudyCondition* c) {
  std::stringstream list(text);
  for (std::string item; std::getline(list, item, ',');) {
    try {
      size_t used = 0;
      double v = std::stod(item, &used);
      while (used < item.size() && item[used] == ' ') ++used;
      if (used != item.size()) return false;
      c->add_feedback_values(v);
    } catch (...) {
      return false;
    }
  }
  return true;
}

}  // namespace

void AddStudyCommands(CommandTable& table) {
  CLI::App* group = table.AddGroup(
      "study", "studies: conditions, participants (pseudonyms), a counterbalanced schedule");

  {
    auto req = std::make_shared<v1::CreateStudyRequest>();
    CLI::App* cmd = table.AddCommand(
        group, "create", "Creates a study and prints its id.",
        [&table, req] { return CallStudy(table, &Admin::CreateStudy, *req, "study created"); });
    cmd->add_option_function<std::string>(
           "NAME", [req](const std::string& v) { req->set_name(v); },
           "the study's name (letters, digits, spaces, '.', '_', '-')")
        ->required();
    cmd->add_option_function<std::string>(
        "--description", [req](const std::string& v) { req->set_description(v); },
        "free text (protocol number, aims)");
  }
  {
    auto req = std::make_shared<v1::ListStudiesRequest>();
    table.AddCommand(group, "list", "Lists studies.", [&table, req] {
      return CallAdmin<v1::ListStudiesRequest, v1::ListStudiesResponse>(
          table.common(), &Admin::ListStudies, *req, [](const v1::ListStudiesResponse& r) {
            std::cout << std::left << std::setw(12) << "STUDY" << std::setw(28) << "CREATED"
                      << std::right << std::setw(11) << "CONDITIONS" << std::setw(13)
                      << "PARTICIPANTS" << std::setw(10) << "SESSIONS"
                      << "  NAME\n";
            for (const auto& s : r.studies()) {
              std::cout << std::left << std::setw(12) << s.id() << std::setw(28)
                        << FormatUtc(s.created_session_ns()) << std::right << std::setw(11)
                        << s.conditions_size() << std::setw(13) << s.participants_size()
                        << std::setw(10) << s.sessions_size() << "  " << s.name() << "\n";
            }
            if (r.studies().empty()) std::cout << "(no studies)\n";
            return kExitOk;
          });
    });
  }
  {
    auto req = std::make_shared<v1::GetStudyRequest>();
    CLI::App* cmd = table.AddCommand(
        group, "show",
        "Shows a study: conditions, participants, the schedule (each participant's order, with "
        "[session] where one was made) and its sessions.",
        [&table, req] { return CallStudy(table, &Admin::GetStudy, *req, nullptr); });
    cmd->add_option_function<std::string>(
           "STUDY", [req](const std::string& v) { req->set_study_id(v); }, "study id (y-...)")
        ->required();
  }
  {
    auto req = std::make_shared<v1::AddStudyConditionRequest>();
    auto values = std::make_shared<std::string>();
    auto lateness_ms = std::make_shared<double>(0);
    CLI::App* cmd = table.AddCommand(
        group, "condition",
        "Adds a condition: a named bundle of session settings that sessions created under it "
        "take.",
        [&table, req, values, lateness_ms] {
          if (!values->empty() && !ParseValues(*values, req->mutable_condition())) {
            std::cerr << "tickmark study condition: --values: numbers separated by commas, e.g. "
                         "-1,1\n";
            return kExitUsage;
          }
          req->mutable_condition()->set_allowed_lateness_ns(
              static_cast<int64_t>(*lateness_ms * 1e6));
          return CallStudy(table, &Admin::AddStudyCondition, *req, "condition added");
        });
    cmd->add_option_function<std::string>(
           "STUDY", [req](const std::string& v) { req->set_study_id(v); }, "study id (y-...)")
        ->required();
    cmd->add_option_function<std::string>(
           "NAME", [req](const std::string& v) { req->mutable_condition()->set_name(v); },
           "condition name (letters, digits, '.', '_', ':', '-')")
        ->required();
    cmd->add_option_function<std::string>(
        "--kernel",
        [req](const std::string& v) { req->mutable_condition()->set_default_kernel(v); },
        "the sessions' default delay kernel, e.g. uniform:0.2,4.0 or gamma:2,0.28 (seconds); "
        "default: the server's");
    cmd->add_flag_callback(
        "--pin-kernels", [req] { req->mutable_condition()->set_pin_kernels(true); },
        "trainers credit with the session's kernels only (no calibration applied on joining)");
    cmd->add_option("--allowed-lateness-ms", *lateness_ms,
                    "how late a record may arrive and still be credited (default: the server's)")
        ->check(tickmark::Between(0, 3.6e6));
    cmd->add_option("--values", *values,
                    "feedback values the protocol allows, comma-separated (e.g. -1,1); recorded, "
                    "not enforced")
        ->type_name("LIST");
    cmd->add_option_function<std::string>(
        "--notes", [req](const std::string& v) { req->mutable_condition()->set_notes(v); },
        "free text (instructions given, what differs)");
  }
  {
    auto req = std::make_shared<v1::EnrollParticipantsRequest>();
    CLI::App* cmd = table.AddCommand(
        group, "enroll",
        "Enrolls participants by pseudonym (never a real name: the key linking pseudonyms to "
        "people stays outside tickmark).",
        [&table, req] { return CallStudy(table, &Admin::EnrollParticipants, *req, "enrolled"); });
    cmd->add_option_function<std::string>(
           "STUDY", [req](const std::string& v) { req->set_study_id(v); }, "study id (y-...)")
        ->required();
    cmd->add_option_function<std::vector<std::string>>(
           "PSEUDONYM",
           [req](const std::vector<std::string>& v) {
             for (const auto& p : v) req->add_participants(p);
           },
           "one or more pseudonyms (P01 P02 ...)")
        ->required();
  }
  {
    auto req = std::make_shared<v1::MakeStudyScheduleRequest>();
    CLI::App* cmd = table.AddCommand(
        group, "schedule",
        "Makes, records and prints a counterbalanced order of the study's conditions per "
        "participant: a balanced Latin square (Williams design) by default.",
        [&table, req] {
          return CallStudy(table, &Admin::MakeStudySchedule, *req, "schedule recorded");
        });
    cmd->add_option_function<std::string>(
           "STUDY", [req](const std::string& v) { req->set_study_id(v); }, "study id (y-...)")
        ->required();
    cmd->add_option_function<std::string>(
           "--design", [req](const std::string& v) { req->set_design(v); },
           "williams (balanced for carry-over; odd counts get 2n orders) or latin (cyclic)")
        ->check(CLI::IsMember({"williams", "latin"}));
  }
}

}  // namespace tickmark::cli
