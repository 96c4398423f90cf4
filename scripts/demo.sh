#!/usr/bin/env bash
# The foundation demo: a real tickmarkd on a temporary ledger, one session, a
# scripted trainer (through tickmark-keys) and a scripted dock rover agent for
# a few seconds, then what the ledger holds. Called by ./run demo.
set -euo pipefail
BUILD=${1:?usage: demo.sh BUILD_DIR}
BIN=$BUILD/bin
DIR=$(mktemp -d -t tickmark-demo-XXXXXX)
SERVER_PID=""

cleanup() {
  [[ -n $SERVER_PID ]] && kill -TERM "$SERVER_PID" 2>/dev/null && wait "$SERVER_PID" 2>/dev/null
  true
}
trap cleanup EXIT

say() { printf '\n\033[1m== %s\033[0m\n' "$*"; }

say "Starting tickmarkd on a temporary ledger in $DIR"
"$BIN/tickmarkd" --data-dir "$DIR" --listen 127.0.0.1:0 --log-level warning >"$DIR/server.out" 2>"$DIR/server.log" &
SERVER_PID=$!
for _ in $(seq 100); do
  grep -q 'listening port=' "$DIR/server.out" 2>/dev/null && break
  kill -0 "$SERVER_PID" 2>/dev/null || { cat "$DIR/server.log"; exit 1; }
  sleep 0.1
done
PORT=$(sed -n 's/.*listening port=\([0-9]*\).*/\1/p' "$DIR/server.out")
[[ -n $PORT ]] || { echo "tickmarkd did not start" >&2; cat "$DIR/server.log" >&2; exit 1; }
export TICKMARK_SERVER=127.0.0.1:$PORT
TM=("$BIN/tickmark" --token-file "$DIR/operator.token")
echo "listening on $TICKMARK_SERVER"

say "Opening a session and issuing tokens"
SESSION=$("${TM[@]}" session create --title "dock rover demo" --token-out "$DIR/admin.token" | sed -n 's/^session \(s-[0-9a-f]*\) opened.*/\1/p')
echo "session $SESSION (admin token in $DIR/admin.token)"
"${TM[@]}" token issue --session "$SESSION" --role trainer --subject trainer-a --out "$DIR/trainer.token"
"${TM[@]}" token issue --session "$SESSION" --role agent --subject rover-1 --out "$DIR/agent.token"

say "A scripted rover steps 5 times a second; a scripted trainer presses +1/-1 (6 s)"
"$BIN/tickmark-scripted-agent" --server "$TICKMARK_SERVER" --token-file "$DIR/agent.token" \
  --seconds 6 --rate 5 &
AGENT_PID=$!
(
  for i in $(seq 12); do
    if ((RANDOM % 3)); then echo "+1"; else echo "-1"; fi
    sleep 0.45
  done
) | "$BIN/tickmark-keys" --server "$TICKMARK_SERVER" --token-file "$DIR/trainer.token" \
      --client-id demo-trainer --stdin-lines >"$DIR/trainer.out"
tail -n 3 "$DIR/trainer.out" | sed 's/^/  trainer: /'
wait "$AGENT_PID"
"$BIN/tickmark" --token-file "$DIR/admin.token" marker add --session "$SESSION" "demo ends"

say "Closing the session: every step settles and gets its final label"
"$BIN/tickmark" --token-file "$DIR/admin.token" session close "$SESSION"

say "What the session holds (tickmark session show)"
"$BIN/tickmark" --token-file "$DIR/admin.token" session show "$SESSION"

say "A few records (tickmark export, JSON Lines)"
"$BIN/tickmark" --token-file "$DIR/admin.token" export --session "$SESSION" --kinds feedback \
  | head -n 2 | cut -c1-300 || true
"$BIN/tickmark" --token-file "$DIR/admin.token" export --session "$SESSION" --kinds step \
  | head -n 1 | cut -c1-300 || true
"$BIN/tickmark" --token-file "$DIR/admin.token" export --session "$SESSION" --kinds label \
  | head -n 1 | cut -c1-300 || true

say "Read the ledger with any SQLite reader"
LEDGER=$DIR/tickmark.db
kill -TERM "$SERVER_PID"; wait "$SERVER_PID" 2>/dev/null || true; SERVER_PID=""
if command -v sqlite3 >/dev/null; then
  sqlite3 -header -column "$LEDGER" \
    "SELECT kind, COUNT(*) AS records FROM record GROUP BY kind ORDER BY records DESC;"
  echo
  sqlite3 -header -column "$LEDGER" \
    "SELECT seq, trainer, value, event_source_ns, arrival_session_ns - event_session_ns AS lag_ns, uncertainty_ns FROM feedback LIMIT 5;"
  echo
  sqlite3 -header -column "$LEDGER" \
    "SELECT l.step_id, s.action, printf('%.4f', l.value) AS label, printf('%.4f', l.weight) AS credit_mass FROM label l JOIN step s ON s.session_id = l.session_id AND s.seq = l.step_seq WHERE l.derived_set = 'live' ORDER BY l.step_id LIMIT 12;"
fi
echo
echo "Ledger: $LEDGER   (try: sqlite3 $LEDGER .tables)"
echo "Server log: $DIR/server.log"
