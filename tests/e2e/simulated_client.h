// Pieces shared by the end-to-end clock tests that run a client on a
// simulated clock behind the link emulator: the clock seen as the client's
// MonotonicSource, and the session's anchor read back from the ledger.
#ifndef TICKMARK_TESTS_E2E_SIMULATED_CLIENT_H_
#define TICKMARK_TESTS_E2E_SIMULATED_CLIENT_H_

#include <sqlite3.h>

#include <cstdint>
#include <optional>
#include <string>

#include "clients/common/stream_client.h"
#include "tools/linkemu/simulated_clock.h"

namespace tickmark::testing {

// A SimulatedClock seen as the client's MonotonicSource (StreamOptions.clock).
class SimulatedSource final : public MonotonicSource {
 public:
  explicit SimulatedSource(const linkemu::SimulatedClock* clock) : clock_(clock) {}
  int64_t NowNanos() const override { return clock_->Now().nanos(); }

 private:
  const linkemu::SimulatedClock* clock_;  // not owned
};

struct Anchor {
  int64_t utc_anchor_ns = 0;
  int64_t mono_anchor_ns = 0;
};

// The session's anchor as the ledger stores it (SQLite C API, read-only; the
// server keeps writing in WAL mode meanwhile).
inline std::optional<Anchor> ReadAnchor(const std::string& ledger_path,
                                        const std::string& session) {
  sqlite3* db = nullptr;
  if (sqlite3_open_v2(ledger_path.c_str(), &db, SQLITE_OPEN_READONLY, nullptr) != SQLITE_OK) {
    sqlite3_close(db);
    return std::nullopt;
  }
  std::optional<Anchor> out;
  sqlite3_stmt* st = nullptr;
  if (sqlite3_prepare_v2(db, "SELECT utc_anchor_ns, mono_anchor_ns FROM session WHERE id = ?",
                         -1, &st, nullptr) == SQLITE_OK) {
    sqlite3_bind_text(st, 1, session.c_str(), -1, SQLITE_TRANSIENT);
    if (sqlite3_step(st) == SQLITE_ROW) {
      out = Anchor{sqlite3_column_int64(st, 0), sqlite3_column_int64(st, 1)};
    }
  }
  sqlite3_finalize(st);
  sqlite3_close(db);
  return out;
}

}  // namespace tickmark::testing

#endif  // TICKMARK_TESTS_E2E_SIMULATED_CLIENT_H_
