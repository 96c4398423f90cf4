#!/usr/bin/env bash
# Runs every benchmark binary already built in BUILD_DIR/bin (named *_bench or
# bench_*), one after another, each under a header. Builds nothing: `./run
# bench` builds first. Extra arguments go to every bench (e.g. --seconds=1).
#   scripts/bench.sh BUILD_DIR [args...]
set -uo pipefail
if [[ $# -lt 1 ]]; then
  echo "usage: $0 BUILD_DIR [bench args...]" >&2
  exit 2
fi
BIN=$1/bin
shift
shopt -s nullglob
benches=()
for f in "$BIN"/*_bench "$BIN"/bench_*; do
  [[ -f $f && -x $f ]] && benches+=("$f")
done
if ((${#benches[@]} == 0)); then
  echo "bench.sh: no *_bench or bench_* programs in $BIN (build them first: ./run build)" >&2
  exit 1
fi
failed=0
for b in "${benches[@]}"; do
  name=$(basename "$b")
  printf '\n==== %s ====\n' "$name"
  "$b" "$@"
  rc=$?
  if ((rc != 0)); then
    echo "bench.sh: $name exited with status $rc" >&2
    failed=1
  fi
done
exit $failed
