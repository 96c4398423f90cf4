#include "server/ledger/postgres/pg_migrations.h"

#include "server/base/log.h"
#include "server/base/strings.h"

namespace tickmark::ledger::pg {
namespace {

struct PgMigration {
  int version;
  const char* description;
  const char* sql;
};

// Times are integer nanoseconds (BIGINT); the column name says the clock, as
// in the proto and the SQLite ledger. The `record` journal is generic: any
// record kind (present or future) is stored there with its hashed bytes;
// typed tables exist only where the ledger's own queries need columns.
constexpr PgMigration kMigrations[] = {
    {1, "sessions, tokens, the record journal and the typed tables reads need", R"sql(
CREATE TABLE session (
  id                TEXT PRIMARY KEY,
  title             TEXT NOT NULL DEFAULT '',
  study             TEXT NOT NULL DEFAULT '',
  state             TEXT NOT NULL CHECK (state IN ('open', 'closed')),
  opened_session_ns BIGINT NOT NULL,
  closed_session_ns BIGINT,
  utc_anchor_ns     BIGINT NOT NULL,
  mono_anchor_ns    BIGINT NOT NULL,
  boot_id           TEXT NOT NULL DEFAULT '',
  pin_kernels       BOOLEAN NOT NULL DEFAULT false
);

CREATE TABLE token (
  id                TEXT PRIMARY KEY,
  session_id        TEXT REFERENCES session(id),
  role              TEXT NOT NULL,
  subject           TEXT NOT NULL DEFAULT '',
  secret_sha256     BYTEA NOT NULL UNIQUE,
  issued_session_ns BIGINT NOT NULL,
  revoked           BOOLEAN NOT NULL DEFAULT false
);
CREATE INDEX token_by_session ON token (session_id);

-- Every record of every session: body is the deterministic protobuf
-- tickmark.v1.Record with its hash field empty, hash = SHA-256(previous
-- hash || body). lease_token is the fencing token the writer held.
CREATE TABLE record (
  session_id         TEXT NOT NULL REFERENCES session(id),
  seq                BIGINT NOT NULL,
  kind               TEXT NOT NULL,
  written_session_ns BIGINT NOT NULL,
  client_id          TEXT,
  client_seq         BIGINT,
  body               BYTEA NOT NULL,
  hash               BYTEA NOT NULL,
  lease_token        BIGINT NOT NULL DEFAULT 0,
  PRIMARY KEY (session_id, seq)
);
CREATE UNIQUE INDEX record_by_client_seq ON record (session_id, client_id, client_seq)
  WHERE client_seq IS NOT NULL;
CREATE INDEX record_by_kind ON record (session_id, kind);

CREATE TABLE client (
  session_id         TEXT NOT NULL,
  client_id          TEXT NOT NULL,
  role               TEXT NOT NULL,
  subject            TEXT NOT NULL,
  source_kind        TEXT NOT NULL,
  source_description TEXT NOT NULL,
  software           TEXT NOT NULL,
  first_seq          BIGINT NOT NULL,
  first_seen_session_ns BIGINT NOT NULL,
  last_seen_session_ns  BIGINT NOT NULL,
  PRIMARY KEY (session_id, client_id)
);

CREATE TABLE feedback (
  session_id TEXT NOT NULL, seq BIGINT NOT NULL,
  client_id TEXT NOT NULL, client_seq BIGINT NOT NULL,
  trainer TEXT NOT NULL, value DOUBLE PRECISION NOT NULL, input TEXT NOT NULL,
  event_source_ns BIGINT NOT NULL, arrival_session_ns BIGINT NOT NULL,
  event_session_ns BIGINT NOT NULL, uncertainty_ns BIGINT NOT NULL,
  late BOOLEAN NOT NULL,
  PRIMARY KEY (session_id, seq)
);

CREATE TABLE step (
  session_id TEXT NOT NULL, seq BIGINT NOT NULL,
  client_id TEXT NOT NULL, client_seq BIGINT NOT NULL,
  agent TEXT NOT NULL, step_id BIGINT NOT NULL, episode BIGINT NOT NULL, action TEXT NOT NULL,
  start_agent_ns BIGINT NOT NULL, end_agent_ns BIGINT,
  start_session_ns BIGINT NOT NULL, end_session_ns BIGINT,
  arrival_session_ns BIGINT NOT NULL, uncertainty_ns BIGINT NOT NULL,
  feature_count BIGINT NOT NULL, late BOOLEAN NOT NULL,
  PRIMARY KEY (session_id, seq)
);

CREATE TABLE probe (
  session_id TEXT NOT NULL, seq BIGINT NOT NULL,
  client_id TEXT NOT NULL, probe_id BIGINT NOT NULL,
  t1_session_ns BIGINT NOT NULL, t2_client_ns BIGINT NOT NULL,
  t3_client_ns BIGINT NOT NULL, t4_session_ns BIGINT NOT NULL,
  offset_ns BIGINT NOT NULL, delay_ns BIGINT NOT NULL,
  accepted BOOLEAN NOT NULL, reject_reason TEXT NOT NULL,
  PRIMARY KEY (session_id, seq)
);

CREATE TABLE calibration_event (
  session_id TEXT NOT NULL, seq BIGINT NOT NULL,
  client_id TEXT NOT NULL, run TEXT NOT NULL,
  PRIMARY KEY (session_id, seq)
);
CREATE INDEX calibration_event_by_run ON calibration_event (session_id, client_id, run);

CREATE TABLE calibration (
  id TEXT PRIMARY KEY, trainer TEXT NOT NULL,
  session_id TEXT NOT NULL, seq BIGINT NOT NULL,
  created_session_ns BIGINT NOT NULL, family TEXT NOT NULL,
  kernel_description TEXT NOT NULL, valid BIGINT NOT NULL,
  warning BOOLEAN NOT NULL, source_kind TEXT NOT NULL
);
CREATE INDEX calibration_by_trainer ON calibration (trainer, created_session_ns);

-- A replay's result, outside the chain: its records kept whole.
CREATE TABLE derived_set (
  session_id TEXT NOT NULL, name TEXT NOT NULL, spec TEXT NOT NULL,
  created_utc TIMESTAMPTZ NOT NULL DEFAULT now(),
  PRIMARY KEY (session_id, name)
);
CREATE TABLE derived_record (
  session_id TEXT NOT NULL, derived_set TEXT NOT NULL, seq BIGINT NOT NULL,
  kind TEXT NOT NULL, body BYTEA NOT NULL,
  PRIMARY KEY (session_id, derived_set, seq)
);

CREATE TABLE time_set (
  ord BIGSERIAL,
  id TEXT PRIMARY KEY, session_id TEXT NOT NULL,
  created_utc TEXT NOT NULL, method TEXT NOT NULL, parameters TEXT NOT NULL,
  through_seq BIGINT NOT NULL, head_hash BYTEA NOT NULL,
  events BIGINT NOT NULL, retimed BIGINT NOT NULL
);
CREATE TABLE derived_time (
  time_set TEXT NOT NULL REFERENCES time_set(id), session_id TEXT NOT NULL,
  seq BIGINT NOT NULL, kind TEXT NOT NULL, client_id TEXT NOT NULL,
  event_session_ns BIGINT NOT NULL, uncertainty_ns BIGINT NOT NULL,
  live_session_ns BIGINT NOT NULL, live_uncertainty_ns BIGINT NOT NULL,
  outcome TEXT NOT NULL, probes BIGINT NOT NULL,
  PRIMARY KEY (time_set, seq, kind)
);

CREATE TABLE ledger_event (
  id BIGSERIAL PRIMARY KEY,
  at_utc TIMESTAMPTZ NOT NULL DEFAULT now(),
  event TEXT NOT NULL,
  detail TEXT NOT NULL
);
)sql"},
    {2, "session leases: one writing instance per session, with a fencing token", R"sql(
-- owner: the instance's id (unique per process); owner_address: where
-- clients reach it; token: the fencing token, raised whenever the owner
-- changes; every write transaction of the owner checks it. Times are the
-- database's clock, so instances need not agree on theirs.
CREATE TABLE session_lease (
  session_id    TEXT PRIMARY KEY REFERENCES session(id),
  owner         TEXT NOT NULL,
  owner_address TEXT NOT NULL,
  token         BIGINT NOT NULL,
  expires_at    TIMESTAMPTZ NOT NULL,
  acquired_at   TIMESTAMPTZ NOT NULL
);
CREATE TABLE lease_event (
  id BIGSERIAL PRIMARY KEY,
  at_utc TIMESTAMPTZ NOT NULL DEFAULT now(),
  session_id TEXT NOT NULL, owner TEXT NOT NULL, owner_address TEXT NOT NULL,
  token BIGINT NOT NULL, previous_owner TEXT NOT NULL DEFAULT ''
);
)sql"},
    {3, "close receipts (docs/audit.md, \"Receipts\")", R"sql(
-- As the SQLite ledger's receipt table: message is exactly the bytes
-- signed, signature the Ed25519 signature, public_key_pem the signing key's
-- public half.
CREATE TABLE receipt (
  session_id        TEXT PRIMARY KEY REFERENCES session(id),
  last_seq          BIGINT NOT NULL,
  head_hash         BYTEA NOT NULL,
  chain_version     INTEGER NOT NULL,
  signed_utc        TEXT NOT NULL,
  message           BYTEA NOT NULL,
  signature         BYTEA NOT NULL,
  public_key_sha256 BYTEA NOT NULL,
  public_key_pem    TEXT NOT NULL
);
)sql"},
};

// pg_advisory_xact_lock key: "tmrk" as a number (any constant would do).
constexpr int64_t kMigrationLock = 0x746d726b;

}  // namespace

int LatestPgMigration() {
  return kMigrations[sizeof kMigrations / sizeof kMigrations[0] - 1].version;
}

absl::Status ApplyPgMigrations(PgConn* conn) {
  if (absl::Status s = conn->Run("BEGIN"); !s.ok()) return s;
  auto fail = [conn](absl::Status s) {
    conn->Run("ROLLBACK").IgnoreError();
    return s;
  };
  if (auto l = conn->Exec("SELECT pg_advisory_xact_lock($1)", Params().Int(kMigrationLock));
      !l.ok()) {
    return fail(l.status());
  }
  if (absl::Status s =
          conn->Run("CREATE TABLE IF NOT EXISTS schema_migrations (version INTEGER PRIMARY KEY, "
                    "description TEXT NOT NULL, applied_utc TIMESTAMPTZ NOT NULL DEFAULT now())");
      !s.ok()) {
    return fail(s);
  }
  auto have = conn->Exec("SELECT COALESCE(MAX(version), 0)::bigint FROM schema_migrations");
  if (!have.ok()) return fail(have.status());
  const int64_t version = have->Int(0, 0);
  if (version > LatestPgMigration()) {
    return fail(absl::FailedPreconditionError(
        Cat("ledger schema version ", version, " is newer than this program knows (",
            LatestPgMigration(), "); use a newer tickmarkd")));
  }
  for (const PgMigration& m : kMigrations) {
    if (m.version <= version) continue;
    absl::Status s = conn->Run(m.sql);
    if (s.ok()) {
      s = conn->Exec("INSERT INTO schema_migrations (version, description) VALUES ($1, $2)",
                     Params().Int(m.version).Text(m.description))
              .status();
    }
    if (!s.ok()) {
      return fail(absl::Status(s.code(), Cat("migration ", m.version, " failed: ", s.message())));
    }
    TM_LOG(kInfo) << "ledger schema migrated to version " << m.version << " (" << m.description
                  << ")";
  }
  return conn->Run("COMMIT");
}

}  // namespace tickmark::ledger::pg
