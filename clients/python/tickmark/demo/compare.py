"""Compares label sets of one demo session: credit precision and what a rover learns.

For each derived set (the live labels, and the sets `tickmark replay`
stored with other kernels) it reads the credit rows from the ledger file
(read-only; SQLite, tables credit, feedback and step) and reports

  credit precision  the share of all credit that landed on the step the
                    simulated trainer judged (its feedback's "judged:<step id>"
                    input; simulation only, no real trainer says this),
  dock success      the demo's approval model trained offline from that
                    set's credit alone (from its first feedback, then all),
                    its greedy policy evaluated on the same seeded episodes
                    (model.evaluate).

    python3 -m tickmark.demo.compare --ledger DIR/tickmark.db --session s-... \\
        --set default=default-kernel --set calibrated=calibrated
"""

from __future__ import annotations

import argparse
import json
import sqlite3
import sys

from tickmark.demo import model
from tickmark.version import add_version_argument

# Feedback counts at which the learning outcome is shown (and at all feedback).
CURVE = (20, 40, 80)


def analyse(db: sqlite3.Connection, session: str, derived_set: str) -> dict:
    """Precision and greedy success of one derived set."""
    steps = {}
    for seq, state, action in db.execute(
            "SELECT seq, state, action FROM step WHERE session_id = ?", (session,)):
        try:
            x, y = (int(v) for v in bytes(state).decode().split(","))
        except ValueError:
            continue
        steps[seq] = ((x, y), action)
    feedback = {}
    for seq, value, text in db.execute(
            "SELECT seq, value, input FROM feedback WHERE session_id = ?", (session,)):
        judged = int(text.split(":")[1]) if text.startswith("judged:") else -1
        feedback[seq] = (judged, value)
    shares = {}
    on_target = total = 0.0
    kernels = set()
    for fseq, sseq, step_id, credit, kernel in db.execute(
            "SELECT feedback_seq, step_seq, step_id, credit, kernel FROM credit "
            "WHERE session_id = ? AND derived_set = ?", (session, derived_set)):
        kernels.add(kernel)
        total += credit
        if fseq in feedback and feedback[fseq][0] == step_id:
            on_target += credit
        shares.setdefault(fseq, []).append((sseq, credit))
    # What a rover learns from this set: the model trained on the first k
    # feedback (in ledger order), for a few k, then on all of it.
    order = sorted(f for f in shares if f in feedback)
    curve = []
    for k in [k for k in CURVE if k < len(order)] + [len(order)]:
        learned = model.ApprovalModel()
        for fseq in order[:k]:
            keys = [(model.key_of(*steps[s]), c) for s, c in shares[fseq] if s in steps]
            learned.add(feedback[fseq][1], keys)
        learned.fit()
        curve.append((k, model.evaluate(lambda s, r: learned.greedy(s, r))))
    return {
        "set": derived_set,
        "kernels": sorted(kernels),
        "credits": len([c for parts in shares.values() for c in parts]),
        "feedback_credited": len(shares),
        "credit_precision": on_target / total if total > 0 else float("nan"),
        "dock_success": curve[-1][1],
        "curve": curve,
    }


def table(results: dict) -> str:
    """The side-by-side text: one column per label set."""
    names = list(results)
    width = max(14, *(len(n) + 2 for n in names))
    first = results[names[0]]
    rows = [("", names),
            ("credit precision", [f"{results[n]['credit_precision']:.2f}" for n in names]),
            ("greedy dock success", ["" for _ in names])]
    for k, _ in first["curve"]:
        label = f"  from all {k} feedback" if k == first["feedback_credited"] else \
            f"  from first {k} feedback"
        rows.append((label, [f"{100 * dict(results[n]['curve']).get(k, float('nan')):.0f}%"
                             for n in names]))
    lines = ["".join([f"{label:<26}"] + [f"{v:>{width}}" for v in values]).rstrip()
             for label, values in rows]
    for n in names:
        lines.append(f"{'kernel, ' + n:<26}" + "; ".join(results[n]["kernels"] or ["-"]))
    return "\n".join(lines)


def main(argv=None) -> int:
    p = argparse.ArgumentParser(prog="python3 -m tickmark.demo.compare", description=__doc__,
                                formatter_class=argparse.RawDescriptionHelpFormatter)
    add_version_argument(p)
    p.add_argument("--ledger", required=True, help="the server's tickmark.db")
    p.add_argument("--session", required=True)
    p.add_argument("--set", action="append", default=[], metavar="COLUMN=DERIVED_SET",
                   help="a column and the derived set it shows ('live' for the live labels)")
    p.add_argument("--json", help="also write the figures here")
    args = p.parse_args(argv)
    if not args.set:
        p.error("give at least one --set COLUMN=DERIVED_SET")
    columns = []
    for item in args.set:
        column, sep, name = item.partition("=")
        if not sep or not column or not name:
            p.error(f"--set {item!r}: want COLUMN=DERIVED_SET")
        columns.append((column, name))
    try:
        db = sqlite3.connect(f"file:{args.ledger}?mode=ro", uri=True)
        results = {column: analyse(db, args.session, name) for column, name in columns}
    except sqlite3.Error as e:
        print(f"compare: {args.ledger}: {e}", file=sys.stderr)
        return 1
    print(table(results))
    if args.json:
        with open(args.json, "w", encoding="utf-8") as f:
            json.dump(results, f, indent=2)
    return 0


if __name__ == "__main__":
    sys.exit(main())
