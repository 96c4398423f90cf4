#!/usr/bin/env bash
# The dock-rover demo (docs/architecture.md §8), called by ./run demo: a real tickmarkd
# on a temporary ledger; a simulated trainer whose clock is offset and drifting and
# whose messages cross an emulated link (150 ms ± 75 ms). First the trainer is
# calibrated (docs/calibration.md: about 40 answers to on-screen moves; its true
# delays are lognormal), then a rover agent learns from settled labels in a session
# whose default kernel is the server's (uniform 0.2-4 s): the trainer's calibrated
# kernel applies when it joins. Prints progress (a live line on a terminal, one line
# per episode in a log), a summary, then the same session replayed with the default
# kernel and with the calibration, side by side: credit precision and what a rover
# learns from each label set. TICKMARK_DEMO_ANSWERS sets the calibration's size.
set -euo pipefail
BUILD=${1:?usage: demo.sh BUILD_DIR [SECONDS]}
SECONDS_TO_DRIVE=${2:-60}
ANSWERS=${TICKMARK_DEMO_ANSWERS:-40}
BIN=$BUILD/bin
PY=/usr/bin/python3
export PYTHONPATH=$BUILD/python${PYTHONPATH:+:$PYTHONPATH}
DIR=$(mktemp -d -t tickmark-demo-XXXXXX)
PIDS=()

cleanup() {
  for pid in "${PIDS[@]}"; do kill -TERM "$pid" 2>/dev/null || true; done
  wait 2>/dev/null || true
}
trap cleanup EXIT

say() {  # bold on a terminal; plain text in a log
  if [[ -t 1 ]]; then printf '\n\033[1m== %s\033[0m\n' "$*"; else printf '\n== %s\n' "$*"; fi
}
wait_for_line() {  # file pattern -> waits up to 10 s for a line matching pattern
  for _ in $(seq 100); do
    grep -q "$2" "$1" 2>/dev/null && return 0
    sleep 0.1
  done
  echo "demo: timed out waiting for '$2' in $1" >&2
  cat "$1" >&2
  return 1
}

cat <<'NOTE'
tickmark demo: a warehouse dock rover learns to drive to its charging dock from a
simulated trainer's approval. Everything here is simulated; a real robot trained
with tickmark needs an independent emergency stop (see README, Safety).
NOTE

say "Starting tickmarkd on a temporary ledger in $DIR"
"$BIN/tickmarkd" --data-dir "$DIR" --listen 127.0.0.1:0 --log-level warning \
  --allowed-lateness-ms 1000 >"$DIR/server.out" 2>"$DIR/server.log" &
PIDS+=($!)
wait_for_line "$DIR/server.out" 'listening port='
PORT=$(sed -n 's/.*listening port=\([0-9]*\).*/\1/p' "$DIR/server.out")
export TICKMARK_SERVER=127.0.0.1:$PORT
TM=("$BIN/tickmark" --token-file "$DIR/operator.token")

say "Emulated link for a remote trainer: 150 ms ± 75 ms each way"
"$BIN/tickmark-linkemu" --target "127.0.0.1:$PORT" --forward-delay-ms 150 --backward-delay-ms 150 \
  --jitter-ms 75 >"$DIR/link.out" 2>&1 &
PIDS+=($!)
wait_for_line "$DIR/link.out" '^listening'
LINK=$(sed -n 's/^listening \([0-9.:]*\).*/\1/p' "$DIR/link.out")
echo "trainer -> $LINK -> tickmarkd $TICKMARK_SERVER"

say "Calibrating the simulated trainer: $ANSWERS answers to moves on screen (true delays lognormal)"
CAL_SESSION=$("${TM[@]}" calibrate new --trainer trainer-sim --token-out "$DIR/calibration.token" \
  | tee "$DIR/calibrate-new.out" | sed -n 's/^session \(s-[0-9a-f]*\) opened.*/\1/p')
sed -n '1,2p' "$DIR/calibrate-new.out"
echo "(a person runs the task with: tickmark-keys --calibrate --token-file FILE --server ADDR)"
$PY -m tickmark.demo.calibrate --server "$LINK" --token-file "$DIR/calibration.token" \
  --answers "$ANSWERS" 2>"$DIR/calibration.log" \
  || { echo "the calibration failed:" >&2; cat "$DIR/calibration.log" >&2; exit 1; }
tail -n 1 "$DIR/calibration.log"
"${TM[@]}" session close "$CAL_SESSION" >/dev/null
"${TM[@]}" calibrate show --trainer trainer-sim --plot "$DIR/calibration.png"

say "Session with the server's default kernel (uniform 0.2-4 s); tokens for the rover, the trainer, an observer"
# The session is made under a small study (docs/studies.md): one condition
# (the server's default kernel, calibrations applied) and one participant.
STUDY=$("${TM[@]}" study create "dock rover demo study" --description "the demo's one condition" \
  | sed -n 's/^study  *\(y-[0-9a-f]*\)$/\1/p')
"${TM[@]}" study condition "$STUDY" default --notes "server default kernel; calibrations apply" >/dev/null
"${TM[@]}" study enroll "$STUDY" trainer-sim >/dev/null
SESSION=$("${TM[@]}" session create --title "dock rover demo" --study "$STUDY" --condition default \
  --participant trainer-sim --token-out "$DIR/admin.token" \
  | sed -n 's/^session \(s-[0-9a-f]*\) opened.*/\1/p')
echo "session $SESSION in study $STUDY (trainer-sim's calibrated kernel applies when it joins)"
ADMIN=("$BIN/tickmark" --token-file "$DIR/admin.token")
"${ADMIN[@]}" token issue --session "$SESSION" --role agent --subject rover-1 --out "$DIR/agent.token"
"${ADMIN[@]}" token issue --session "$SESSION" --role trainer --subject trainer-sim --out "$DIR/trainer.token"
"${ADMIN[@]}" token issue --session "$SESSION" --role observer --out "$DIR/observer.token"

say "Training for ${SECONDS_TO_DRIVE} s (trainer clock +3.2 s, +80 ppm; reaction delay lognormal, as calibrated)"
$PY -m tickmark.demo.trainer --server "$LINK" --token-file "$DIR/trainer.token" \
  --watch-server "$TICKMARK_SERVER" --watch-token-file "$DIR/observer.token" \
  --seconds "$((SECONDS_TO_DRIVE + 1))" 2>"$DIR/trainer.log" &
TRAINER=$!
PIDS+=($TRAINER)
$PY -m tickmark.demo.learner --server "$TICKMARK_SERVER" --token-file "$DIR/agent.token" \
  --seconds "$SECONDS_TO_DRIVE" --summary "$DIR/summary.json" --plot "$DIR/dock-rover.png" \
  >"$DIR/learner.out" &
LEARNER=$!
PIDS+=($LEARNER)
wait "$TRAINER" || { echo "the simulated trainer failed:" >&2; cat "$DIR/trainer.log" >&2; exit 1; }
tail -n 1 "$DIR/trainer.log"
"${ADMIN[@]}" session close "$SESSION" >/dev/null
wait "$LEARNER"

say "Summary"
cat "$DIR/learner.out"
"${ADMIN[@]}" session show "$SESSION" | sed -n '/^records/,$p'
# The kernel settings of the session, from its ledger: the default, then the
# trainer's calibrated kernel set when it joined.
"${ADMIN[@]}" export --session "$SESSION" --kinds kernel | $PY -c '
import json, sys
for line in sys.stdin:
    r = json.loads(line)
    who = r.get("trainer") or "(session default)"
    came = " from calibration " + r["calibration"] if r.get("calibration") else ""
    desc = r.get("description", "?")
    print(f"kernel of {who}: {desc}{came}")'

say "Replaying the session: the default kernel for everyone, then each trainer's calibration"
"${TM[@]}" replay --session "$SESSION" --name default-kernel --kernel uniform:0.2,4.0 \
  | sed -n '1,3p'
"${TM[@]}" replay --session "$SESSION" --name calibrated --calibrated | sed -n '1,3p'

say "Default kernel vs calibrated kernel: the same feedback on the same steps"
$PY -m tickmark.demo.compare --ledger "$DIR/tickmark.db" --session "$SESSION" \
  --set "default kernel=default-kernel" --set "calibrated=calibrated" --json "$DIR/compare.json"
echo "(credit precision: the share of credit on the step the trainer judged; greedy dock success:"
echo " the rover's approval model trained offline from that label set alone, from its first"
echo " feedback and from all of it, its greedy policy on 100 seeded episodes)"

"${TM[@]}" report --session "$SESSION" --ledger "$DIR/tickmark.db" --out "$DIR/report.html" >/dev/null \
  || echo "(the session report could not be written; see above)" >&2

say "Files"
echo "report:  $DIR/report.html   (tickmark report --session $SESSION; docs/studies.md)"
echo "plot:    $DIR/dock-rover.png"
echo "fits:    $DIR/calibration.png"
echo "ledger:  $DIR/tickmark.db   (sqlite3 $DIR/tickmark.db .tables)"
echo "export:  $BIN/tickmark --server $TICKMARK_SERVER --token-file $DIR/admin.token export --session $SESSION"
echo "         (the server stops when this demo ends; the ledger stays)"
