// Small pieces the CLI's commands print or write the same way: UTC times,
// role words, secret files.
//
// Pure functions apart from WriteSecretFile; thread-safe.
#ifndef TICKMARK_CLIENTS_CLI_OUTPUT_H_
#define TICKMARK_CLIENTS_CLI_OUTPUT_H_

#include <cstdint>
#include <optional>
#include <string>

#include "tickmark/v1/records.pb.h"

namespace tickmark::cli {

// "2026-12-02 15:04:05.123 UTC" for a UTC instant in ns; "-" for 0.
std::string FormatUtc(int64_t ns);

// A duration in nanoseconds as milliseconds with three decimals: "12.345 ms".
std::string FormatMillis(int64_t ns);

// "trainer" for ROLE_TRAINER (the generated name without its prefix).
std::string RoleWord(tickmark::v1::Role role);
// ROLE_TRAINER for "trainer"; nullopt for anything that is not a role word
// (including "unspecified").
std::optional<tickmark::v1::Role> ParseRoleWord(const std::string& word);

// A kernel's canonical text for a table: an empirical kernel's counts
// (hundreds of numbers for a fitted mixture) become "counts=<N bins>".
std::string ShortKernelText(const std::string& description);

// Writes `secret` and a newline to a new file only its owner can read;
// prints why on failure.
bool WriteSecretFile(const std::string& path, const std::string& secret);

}  // namespace tickmark::cli

#endif  // TICKMARK_CLIENTS_CLI_OUTPUT_H_
