// A single-session copy of a ledger (docs/audit.md, "Archive"): the whole
// file copied with SQLite's online backup API (a consistent snapshot, also
// of a ledger a running server is writing), then every other session's rows,
// every token and the server's own notes deleted from the copy, which is
// vacuumed (secure_delete on) and left in rollback-journal mode as one
// self-contained file. The session's records, personal contents and receipt
// are kept as they are, so `tickmark audit verify --ledger FILE` accepts it.
//
// Thread safety: free function.
#ifndef TICKMARK_SERVER_AUDIT_ARCHIVE_H_
#define TICKMARK_SERVER_AUDIT_ARCHIVE_H_

#include <string>

#include "absl/status/status.h"

namespace tickmark::audit {

// ALREADY_EXISTS if `out` exists; NOT_FOUND for an unknown session or file.
absl::Status ArchiveSession(const std::string& ledger_path, const std::string& session_id,
                            const std::string& out);

}  // namespace tickmark::audit

#endif  // TICKMARK_SERVER_AUDIT_ARCHIVE_H_
