// Flattens ledger records into one JSON object per line (JSON Lines), the
// export format of `tickmark export`.
//
// Every line has: session_id, seq, kind, session_ns (the record's instant on
// session time: a feedback's event time, a step's start, a probe's T4, a
// marker's time, otherwise when it was written), written_session_ns, hash
// (hex), then the fields of the record's body under their proto names.
// Integers stay JSON numbers (nanosecond times fit exactly in a double only
// up to 2^53 ns ≈ 104 days, so readers that care should parse them as
// int64, as pandas does); enums are lower-case names; bytes are base64;
// nested messages become objects; repeated fields become arrays.
// So `pandas.read_json(path, lines=True)` reads an export with no glue.
//
// Pure functions; thread-safe.
#ifndef TICKMARK_CLIENTS_CLI_JSONL_H_
#define TICKMARK_CLIENTS_CLI_JSONL_H_

#include <string>

#include "tickmark/v1/records.pb.h"

namespace tickmark::cli {

std::string RecordToJsonLine(const tickmark::v1::Record& record);

// The instant a record is about, on session time.
int64_t RecordSessionNs(const tickmark::v1::Record& record);

}  // namespace tickmark::cli

#endif  // TICKMARK_CLIENTS_CLI_JSONL_H_
