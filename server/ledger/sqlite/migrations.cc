#include "server/ledger/sqlite/migrations.h"

namespace tickmark::ledger {
namespace {

// Times are integer nanoseconds; the column name says the clock
// (_session_ns, _source_ns, _agent_ns, _client_ns), as in the proto.
constexpr Migration kMigrations[] = {
    {1, "sessions, tokens, clients, the record journal and typed tables", R"sql(
CREATE TABLE session (
  id                TEXT PRIMARY KEY,
  title             TEXT NOT NULL DEFAULT '',
  study             TEXT NOT NULL DEFAULT '',
  state             TEXT NOT NULL CHECK (state IN ('open', 'closed')),
  opened_session_ns INTEGER NOT NULL,
  closed_session_ns INTEGER,
  utc_anchor_ns     INTEGER NOT NULL,
  mono_anchor_ns    INTEGER NOT NULL,
  boot_id           TEXT NOT NULL DEFAULT ''
);

CREATE TABLE token (
  id                TEXT PRIMARY KEY,
  session_id        TEXT REFERENCES session(id),
  role              TEXT NOT NULL CHECK (role IN ('admin', 'trainer', 'agent', 'observer')),
  subject           TEXT NOT NULL DEFAULT '',
  secret_sha256     BLOB NOT NULL UNIQUE,
  issued_session_ns INTEGER NOT NULL,
  revoked           INTEGER NOT NULL DEFAULT 0
);

-- Every record of every session, in sequence order: the journal that
-- subscribers replay and a chain check re-hashes. body is the protobuf
-- tickmark.v1.Record (with its hash field empty); hash chains the records.
CREATE TABLE record (
  session_id         TEXT NOT NULL REFERENCES session(id),
  seq                INTEGER NOT NULL,
  kind               TEXT NOT NULL,
  written_session_ns INTEGER NOT NULL,
  client_id          TEXT,
  client_seq         INTEGER,
  body               BLOB NOT NULL,
  hash               BLOB NOT NULL,
  PRIMARY KEY (session_id, seq)
) WITHOUT ROWID;
CREATE UNIQUE INDEX record_by_client_seq ON record (session_id, client_id, client_seq)
  WHERE client_seq IS NOT NULL;

-- Typed tables: the same records, one column per field, for SQL readers.
CREATE TABLE client (
  session_id         TEXT NOT NULL,
  client_id          TEXT NOT NULL,
  role               TEXT NOT NULL,
  subject            TEXT NOT NULL,
  source_kind        TEXT NOT NULL,
  source_description TEXT NOT NULL,
  software           TEXT NOT NULL,
  first_seq          INTEGER NOT NULL,
  first_seen_session_ns INTEGER NOT NULL,
  last_seen_session_ns  INTEGER NOT NULL,
  PRIMARY KEY (session_id, client_id)
) WITHOUT ROWID;

CREATE TABLE client_event (
  session_id TEXT NOT NULL, seq INTEGER NOT NULL,
  client_id  TEXT NOT NULL,
  event      TEXT NOT NULL,
  detail     TEXT NOT NULL,
  at_session_ns INTEGER NOT NULL,
  PRIMARY KEY (session_id, seq)
) WITHOUT ROWID;

CREATE TABLE feedback (
  session_id         TEXT NOT NULL, seq INTEGER NOT NULL,
  client_id          TEXT NOT NULL,
  client_seq         INTEGER NOT NULL,
  trainer            TEXT NOT NULL,
  value              REAL NOT NULL,
  input              TEXT NOT NULL,
  event_source_ns    INTEGER NOT NULL,
  arrival_session_ns INTEGER NOT NULL,
  event_session_ns   INTEGER NOT NULL,
  uncertainty_ns     INTEGER NOT NULL,
  late               INTEGER NOT NULL,
  PRIMARY KEY (session_id, seq)
) WITHOUT ROWID;

CREATE TABLE step (
  session_id         TEXT NOT NULL, seq INTEGER NOT NULL,
  client_id          TEXT NOT NULL,
  client_seq         INTEGER NOT NULL,
  agent              TEXT NOT NULL,
  step_id            INTEGER NOT NULL,
  episode            INTEGER NOT NULL,
  action             TEXT NOT NULL,
  start_agent_ns     INTEGER NOT NULL,
  end_agent_ns       INTEGER,
  start_session_ns   INTEGER NOT NULL,
  end_session_ns     INTEGER,
  arrival_session_ns INTEGER NOT NULL,
  uncertainty_ns     INTEGER NOT NULL,
  state              BLOB NOT NULL,
  feature_count      INTEGER NOT NULL,
  late               INTEGER NOT NULL,
  PRIMARY KEY (session_id, seq)
) WITHOUT ROWID;

CREATE TABLE probe (
  session_id    TEXT NOT NULL, seq INTEGER NOT NULL,
  client_id     TEXT NOT NULL,
  probe_id      INTEGER NOT NULL,
  t1_session_ns INTEGER NOT NULL,
  t2_client_ns  INTEGER NOT NULL,
  t3_client_ns  INTEGER NOT NULL,
  t4_session_ns INTEGER NOT NULL,
  offset_ns     INTEGER NOT NULL,
  delay_ns      INTEGER NOT NULL,
  accepted      INTEGER NOT NULL,
  reject_reason TEXT NOT NULL,
  PRIMARY KEY (session_id, seq)
) WITHOUT ROWID;

CREATE TABLE clock_model (
  session_id          TEXT NOT NULL, seq INTEGER NOT NULL,
  client_id           TEXT NOT NULL,
  offset_ns           INTEGER NOT NULL,
  drift_ppm           REAL NOT NULL,
  reference_client_ns INTEGER NOT NULL,
  uncertainty_ns      INTEGER NOT NULL,
  min_delay_ns        INTEGER NOT NULL,
  samples             INTEGER NOT NULL,
  reason              TEXT NOT NULL,
  PRIMARY KEY (session_id, seq)
) WITHOUT ROWID;

CREATE TABLE marker (
  session_id    TEXT NOT NULL, seq INTEGER NOT NULL,
  at_session_ns INTEGER NOT NULL,
  text          TEXT NOT NULL,
  author        TEXT NOT NULL,
  PRIMARY KEY (session_id, seq)
) WITHOUT ROWID;

-- Derived records: credit of one feedback on one step, and settled labels.
-- derived_set is 'live' for what the server computed while the session ran;
-- replays with another kernel write under their own name.
CREATE TABLE credit (
  session_id    TEXT NOT NULL, seq INTEGER NOT NULL,
  derived_set   TEXT NOT NULL DEFAULT 'live',
  feedback_seq  INTEGER NOT NULL,
  step_seq      INTEGER NOT NULL,
  trainer       TEXT NOT NULL,
  agent         TEXT NOT NULL,
  step_id       INTEGER NOT NULL,
  credit        REAL NOT NULL,
  value         REAL NOT NULL,
  weight        REAL NOT NULL,
  kernel        TEXT NOT NULL,
  PRIMARY KEY (session_id, derived_set, seq)
) WITHOUT ROWID;

CREATE TABLE label (
  session_id  TEXT NOT NULL, seq INTEGER NOT NULL,
  derived_set TEXT NOT NULL DEFAULT 'live',
  step_seq    INTEGER NOT NULL,
  agent       TEXT NOT NULL,
  step_id     INTEGER NOT NULL,
  value       REAL NOT NULL,
  weight      REAL NOT NULL,
  parts       TEXT NOT NULL,  -- JSON array of {trainer, value, weight}
  PRIMARY KEY (session_id, derived_set, seq)
) WITHOUT ROWID;

-- A feedback (or a step, step_seq set) that got no credit, and why.
CREATE TABLE unmatched (
  session_id   TEXT NOT NULL, seq INTEGER NOT NULL,
  derived_set  TEXT NOT NULL DEFAULT 'live',
  feedback_seq INTEGER,
  trainer      TEXT NOT NULL,
  step_seq     INTEGER,
  agent        TEXT NOT NULL,
  reason       TEXT NOT NULL,
  PRIMARY KEY (session_id, derived_set, seq)
) WITHOUT ROWID;

-- Derived sets made by replays: the kernels they used. In credit, label and
-- unmatched rows of a derived set, seq numbers the rows within the set.
CREATE TABLE derived_set (
  session_id   TEXT NOT NULL,
  name         TEXT NOT NULL,
  created_utc  TEXT NOT NULL DEFAULT (strftime('%Y-%m-%dT%H:%M:%SZ','now')),
  spec         TEXT NOT NULL,
  PRIMARY KEY (session_id, name)
) WITHOUT ROWID;

-- The delay kernel and weight in force for a trainer from this record on
-- (trainer '' is the session default).
CREATE TABLE kernel_setting (
  session_id  TEXT NOT NULL, seq INTEGER NOT NULL,
  trainer     TEXT NOT NULL,
  description TEXT NOT NULL,
  weight      REAL NOT NULL,
  author      TEXT NOT NULL,
  PRIMARY KEY (session_id, seq)
) WITHOUT ROWID;

CREATE TABLE session_event (
  session_id    TEXT NOT NULL, seq INTEGER NOT NULL,
  event         TEXT NOT NULL,
  detail        TEXT NOT NULL,
  at_session_ns INTEGER NOT NULL,
  PRIMARY KEY (session_id, seq)
) WITHOUT ROWID;
)sql"},
    {2, "ledger_event: the server's own notes on the ledger (writes failing/resumed, losses accepted)",
     R"sql(
-- Not part of any session's chain: what happened to the ledger itself.
-- write_failing is committed from the space of the reserve file when the
-- disk is full; write_resumed when writes work again; records_lost_accepted
-- and new_ledger when an operator started over a loss on purpose.
CREATE TABLE ledger_event (
  id     INTEGER PRIMARY KEY,
  at_utc TEXT NOT NULL DEFAULT (strftime('%Y-%m-%dT%H:%M:%fZ','now')),
  event  TEXT NOT NULL CHECK (event IN ('write_failing', 'write_resumed',
                                        'records_lost_accepted', 'new_ledger')),
  detail TEXT NOT NULL
);
)sql"},
    {3, "calibration: calibration_event and calibration tables, session.pin_kernels, "
        "kernel_setting.calibration",
     R"sql(
-- One row per CalibrationEvent record: a move shown by a calibration task or
-- a trainer's answer (kind 'move' / 'answer'). move is 0 for answers;
-- approve is the move's rule verdict or the answer's sign.
CREATE TABLE calibration_event (
  session_id         TEXT NOT NULL, seq INTEGER NOT NULL,
  client_id          TEXT NOT NULL,
  client_seq         INTEGER NOT NULL,
  trainer            TEXT NOT NULL,
  run                TEXT NOT NULL,
  kind               TEXT NOT NULL CHECK (kind IN ('move', 'answer')),
  move               INTEGER NOT NULL,
  at_source_ns       INTEGER NOT NULL,
  approve            INTEGER NOT NULL,
  practice           INTEGER NOT NULL,
  detail             TEXT NOT NULL,
  at_session_ns      INTEGER NOT NULL,
  uncertainty_ns     INTEGER NOT NULL,
  arrival_session_ns INTEGER NOT NULL,
  PRIMARY KEY (session_id, seq)
) WITHOUT ROWID;
CREATE INDEX calibration_event_by_run ON calibration_event (session_id, client_id, run, seq);

-- One row per Calibration record, server-wide: a calibration belongs to the
-- trainer pseudonym on this server, not only to the session it was measured
-- in. The full record (every family's fit, the matches) is the body of the
-- record (session_id, seq).
CREATE TABLE calibration (
  id                 TEXT PRIMARY KEY,
  trainer            TEXT NOT NULL,
  session_id         TEXT NOT NULL,
  seq                INTEGER NOT NULL,
  created_session_ns INTEGER NOT NULL,
  family             TEXT NOT NULL,
  kernel_description TEXT NOT NULL,
  valid              INTEGER NOT NULL,
  warning            INTEGER NOT NULL,
  source_kind        TEXT NOT NULL
);
CREATE INDEX calibration_by_trainer ON calibration (trainer, created_session_ns);

-- 1: trainers credit with the session's kernels only (no calibration is
-- applied when a calibrated trainer joins).
ALTER TABLE session ADD COLUMN pin_kernels INTEGER NOT NULL DEFAULT 0;
-- The calibration a kernel setting came from ('' when none).
ALTER TABLE kernel_setting ADD COLUMN calibration TEXT NOT NULL DEFAULT '';
)sql"},
    {4, "retiming: time_set and derived_time tables (event times recomputed after the fact)",
     R"sql(
-- Derived time sets (tickmark retime): a session's event times recomputed
-- after the fact from all of its probes, stored beside the originals, which
-- are never changed. Like a replay's derived set, a time set lies outside the
-- session's hash chain; through_seq and head_hash (the hash of record
-- through_seq) name the journal state it was computed from, so a reader can
-- check it against the chain. method and parameters (JSON) say how it was
-- computed; events counts its derived_time rows, retimed those recomputed.
CREATE TABLE time_set (
  id          TEXT PRIMARY KEY,
  session_id  TEXT NOT NULL REFERENCES session(id),
  created_utc TEXT NOT NULL DEFAULT (strftime('%Y-%m-%dT%H:%M:%fZ','now')),
  method      TEXT NOT NULL,
  parameters  TEXT NOT NULL CHECK (json_valid(parameters)),
  through_seq INTEGER NOT NULL,
  head_hash   BLOB NOT NULL,
  events      INTEGER NOT NULL,
  retimed     INTEGER NOT NULL
);
CREATE INDEX time_set_by_session ON time_set (session_id);

-- One event time of a time set: a feedback's event or a step's start or end
-- (kind) of the record (session_id, seq); the recomputed time and its
-- uncertainty, the live ones beside them, what the method made of it
-- (outcome: 'retimed', or why the live time was kept) and how many probes
-- bounded it.
CREATE TABLE derived_time (
  time_set            TEXT NOT NULL REFERENCES time_set(id),
  session_id          TEXT NOT NULL,
  seq                 INTEGER NOT NULL,
  kind                TEXT NOT NULL CHECK (kind IN ('feedback', 'step_start', 'step_end')),
  client_id           TEXT NOT NULL,
  event_session_ns    INTEGER NOT NULL,
  uncertainty_ns      INTEGER NOT NULL,
  live_session_ns     INTEGER NOT NULL,
  live_uncertainty_ns INTEGER NOT NULL,
  outcome             TEXT NOT NULL,
  probes              INTEGER NOT NULL,
  PRIMARY KEY (time_set, seq, kind)
) WITHOUT ROWID;
)sql"},
    {5, "studies: session.kind/condition/participants, study_event table", R"sql(
-- A study's journal is a row of kind 'study' in session (id "y-...", title =
-- the study's name) whose records live in record like a session's, with
-- their own sequence numbers and hash chain (docs/studies.md). Sessions made
-- under a study name its condition and participants (a JSON array of
-- pseudonyms; study holds the study id).
ALTER TABLE session ADD COLUMN kind TEXT NOT NULL DEFAULT 'session'
  CHECK (kind IN ('session', 'study'));
ALTER TABLE session ADD COLUMN condition TEXT NOT NULL DEFAULT '';
ALTER TABLE session ADD COLUMN participants TEXT NOT NULL DEFAULT '[]';

-- One row per StudyEvent record of a study's journal (session_id is the
-- study id): event created/condition/participants/schedule/session; name is
-- the study's name (created) or the condition's (condition, session);
-- participants a JSON array of pseudonyms; linked_session the session made
-- (event session); detail the condition's settings or the schedule's design.
CREATE TABLE study_event (
  session_id     TEXT NOT NULL, seq INTEGER NOT NULL,
  event          TEXT NOT NULL,
  name           TEXT NOT NULL,
  participants   TEXT NOT NULL,
  linked_session TEXT NOT NULL,
  detail         TEXT NOT NULL,
  at_session_ns  INTEGER NOT NULL,
  PRIMARY KEY (session_id, seq)
) WITHOUT ROWID;
)sql"},
    {6, "sync pulses: the sync_pulse table (edges of sync lines shared with other recorders)",
     R"sql(
-- One row per SyncPulse record (docs/sync.md): an edge of a modem control
-- line that a client drove (direction 'out': DTR, RTS) or saw (direction
-- 'in': CTS, DSR, DCD). event_source_ns is on the client's CLOCK_MONOTONIC
-- (source_uncertainty_ns: half the bracket around the ioctl);
-- event_session_ns and uncertainty_ns are mapped like a feedback's.
-- marker_seq names the marker record a marker pulse answers (NULL: none).
CREATE TABLE sync_pulse (
  session_id            TEXT NOT NULL,
  seq                   INTEGER NOT NULL,
  client_id             TEXT NOT NULL,
  client_seq            INTEGER NOT NULL,
  trainer               TEXT NOT NULL,
  direction             TEXT NOT NULL CHECK (direction IN ('out', 'in')),
  line                  TEXT NOT NULL,
  level                 INTEGER NOT NULL,
  event_source_ns       INTEGER NOT NULL,
  source_uncertainty_ns INTEGER NOT NULL,
  event_session_ns      INTEGER NOT NULL,
  uncertainty_ns        INTEGER NOT NULL,
  arrival_session_ns    INTEGER NOT NULL,
  reason                TEXT NOT NULL,
  pulse_index           INTEGER NOT NULL,
  marker_seq            INTEGER,
  device                TEXT NOT NULL,
  simulated             INTEGER NOT NULL,
  PRIMARY KEY (session_id, seq)
) WITHOUT ROWID;
CREATE INDEX sync_pulse_by_time ON sync_pulse (session_id, event_session_ns);
)sql"},
    {7, "chain version 2: personal content beside the chain, receipts, erasure", R"sql(
-- How a session's records are chained (docs/audit.md): 1 for the sessions
-- made before this migration (the whole record is hashed), 2 for new ones
-- (SqliteLedger::CreateSession sets it).
ALTER TABLE session ADD COLUMN chain_version INTEGER NOT NULL DEFAULT 1;

-- Chain version 2: the personal content of a record (PersonalContent,
-- serialised) and the random salt of the digest its body holds:
-- SHA-256(salt || content). Erasing a participant deletes their rows.
CREATE TABLE personal (
  session_id  TEXT NOT NULL,
  seq         INTEGER NOT NULL,
  participant TEXT NOT NULL,
  salt        BLOB NOT NULL,
  content     BLOB NOT NULL,
  PRIMARY KEY (session_id, seq)
) WITHOUT ROWID;
CREATE INDEX personal_by_participant ON personal (participant);

-- The typed copies of erased fields read 0 / '' with erased = 1.
ALTER TABLE feedback ADD COLUMN erased INTEGER NOT NULL DEFAULT 0;
ALTER TABLE calibration_event ADD COLUMN erased INTEGER NOT NULL DEFAULT 0;

-- A session's close receipt (docs/audit.md, "Receipts"): message is exactly
-- the bytes signed, signature the Ed25519 signature (64 bytes),
-- public_key_pem the signing key's public half.
CREATE TABLE receipt (
  session_id        TEXT PRIMARY KEY REFERENCES session(id),
  last_seq          INTEGER NOT NULL,
  head_hash         BLOB NOT NULL,
  chain_version     INTEGER NOT NULL,
  signed_utc        TEXT NOT NULL,
  message           BLOB NOT NULL,
  signature         BLOB NOT NULL,
  public_key_sha256 BLOB NOT NULL,
  public_key_pem    TEXT NOT NULL
);
)sql"},
};

}  // namespace

std::span<const Migration> SqliteMigrations() { return kMigrations; }

}  // namespace tickmark::ledger
