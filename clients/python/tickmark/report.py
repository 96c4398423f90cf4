"""A session's report, or a study's summary, as one self-contained HTML file.

    python3 -m tickmark.report --server 127.0.0.1:7461 --session s-7f3a2c91 --out report.html
    python3 -m tickmark.report --server 127.0.0.1:7461 --study y-1a2b3c4d --out study.html

`tickmark report` runs this module with the CLI's server and token (the token
in $TICKMARK_TOKEN). Figures are drawn with matplotlib (Agg) and embedded as
base64 PNG; the page references nothing outside itself (no scripts, styles,
fonts or images from anywhere), so it can be mailed or archived as it is.

A session's report: counts (late, unmatched, rejected probes), a timeline of
steps, feedback and markers, feedback rate and values per trainer, each
trainer's calibration fit, credit and label distributions, each client's clock
uncertainty over time, and the audit status (`tickmark audit verify`, when the
CLI has it; otherwise "not checked"). docs/studies.md describes the pages.

Needs Debian's python3-matplotlib, python3-numpy, python3-grpcio and
python3-protobuf; SciPy (python3-scipy) draws the fitted delay densities when
present.
"""

from __future__ import annotations

import argparse
import base64
import collections
import datetime
import html
import io
import os
import subprocess
import sys
from typing import Dict, List, Optional

import grpc

from tickmark._connect import open_channel, read_token
from tickmark.subscription import Subscription
from tickmark.v1 import admin_pb2, admin_pb2_grpc, records_pb2

NS = 1e9


# ---------------------------------------------------------------- data


class SessionData:
    """A session's summary and its records, grouped by kind."""

    def __init__(self, summary: admin_pb2.SessionSummary, records: List[records_pb2.Record]):
        self.summary = summary
        self.session = summary.session
        self.by_kind: Dict[str, list] = collections.defaultdict(list)
        for r in records:
            kind = r.WhichOneof("body")
            self.by_kind[kind].append(r)
        self.t0 = self.session.opened_session_ns

    def rel(self, ns: int) -> float:
        """Seconds since the session opened."""
        return (ns - self.t0) / NS


def load_session(channel: grpc.Channel, token: str, session_id: str) -> SessionData:
    stub = admin_pb2_grpc.SessionAdminStub(channel)
    md = (("authorization", "Bearer " + token),)
    summary = stub.GetSession(admin_pb2.GetSessionRequest(session_id=session_id), metadata=md,
                              timeout=30)
    with Subscription(channel, token, session_id, follow=False) as sub:
        records = list(sub)
    # A trainer calibrated in another session credits here with that
    # calibration (its kernel record names it): fetch it for the fit figure.
    have = {r.calibration.id for r in records if r.WhichOneof("body") == "calibration"}
    for r in list(records):
        cal = r.kernel.calibration if r.WhichOneof("body") == "kernel" else ""
        if cal and cal not in have:
            have.add(cal)
            try:
                c = stub.GetCalibration(admin_pb2.GetCalibrationRequest(id=cal), metadata=md,
                                        timeout=30)
                records.append(records_pb2.Record(calibration=c))
            except grpc.RpcError:
                pass  # not visible to this token: the figure shows the others
    return SessionData(summary, records)


def load_study(channel: grpc.Channel, token: str, study_id: str) -> admin_pb2.Study:
    stub = admin_pb2_grpc.SessionAdminStub(channel)
    return stub.GetStudy(admin_pb2.GetStudyRequest(study_id=study_id),
                         metadata=(("authorization", "Bearer " + token),), timeout=30)


# ---------------------------------------------------------------- audit hook

# The audit status comes from `tickmark audit verify --session S --ledger F`
# (docs/audit.md), which recomputes the chain from the ledger file itself, so
# it needs that file: without --ledger the report says "not checked" — never
# "verified" without a check. Exit codes: 0 verified, 1 broken (FAILED), else
# not checked (no such file, an older CLI without the command, ...), with
# the command's output shown either way.


def audit_status(cli: Optional[str], ledger: Optional[str],
                 session_id: str) -> Dict[str, str]:
    if not ledger:
        return {"state": "not checked",
                "detail": "the chain is recomputed from the ledger file: give --ledger FILE "
                          "(a copy will do) to check it"}
    if not cli or not os.access(cli, os.X_OK):
        return {"state": "not checked", "detail": "no tickmark CLI to run `audit verify` with"}
    try:
        run = subprocess.run([cli, "audit", "verify", "--session", session_id, "--ledger", ledger],
                             capture_output=True, text=True, timeout=300)
    except (OSError, subprocess.SubprocessError) as e:
        return {"state": "not checked", "detail": f"audit verify did not run: {e}"}
    out = (run.stdout + run.stderr).strip()
    state = {0: "verified", 1: "FAILED"}.get(run.returncode, "not checked")
    return {"state": state, "detail": out}


# ---------------------------------------------------------------- figures


def _plt():
    import matplotlib
    matplotlib.use("Agg")
    import matplotlib.pyplot as plt
    return plt


def _png(fig) -> str:
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=90, bbox_inches="tight")
    _plt().close(fig)
    return base64.b64encode(buf.getvalue()).decode("ascii")


def fig_timeline(d: SessionData) -> Optional[str]:
    plt = _plt()
    steps = d.by_kind.get("step", [])
    feedback = d.by_kind.get("feedback", [])
    markers = d.by_kind.get("marker", [])
    if not steps and not feedback and not markers:
        return None
    agents = sorted({r.step.agent for r in steps})
    trainers = sorted({r.feedback.trainer for r in feedback})
    rows = [("agent " + a) for a in agents] + [("trainer " + t) for t in trainers]
    fig, ax = plt.subplots(figsize=(11, 1.2 + 0.5 * max(1, len(rows))))
    for i, a in enumerate(agents):
        spans = []
        for r in steps:
            if r.step.agent != a:
                continue
            start = d.rel(r.step.start_session_ns)
            end = d.rel(r.step.end_session_ns) if r.step.end_session_ns else start + 0.05
            spans.append((start, max(end - start, 0.01)))
        ax.broken_barh(spans, (i - 0.35, 0.7), facecolors="#8fb3d9", edgecolor="#3b6ea5",
                       linewidth=0.3)
    for j, t in enumerate(trainers):
        y = len(agents) + j
        pos = [d.rel(r.feedback.event_session_ns) for r in feedback
               if r.feedback.trainer == t and r.feedback.value > 0]
        neg = [d.rel(r.feedback.event_session_ns) for r in feedback
               if r.feedback.trainer == t and r.feedback.value <= 0]
        ax.scatter(pos, [y] * len(pos), marker="^", color="#2a9d3f", s=28, label=None)
        ax.scatter(neg, [y] * len(neg), marker="v", color="#c0392b", s=28, label=None)
    for r in markers:
        x = d.rel(r.marker.at_session_ns)
        ax.axvline(x, color="#888", linestyle="--", linewidth=0.8)
        ax.text(x, len(rows) - 0.4, " " + r.marker.text, rotation=0, fontsize=7,
                va="bottom", color="#444")
    ax.set_yticks(range(len(rows)))
    ax.set_yticklabels(rows)
    ax.set_ylim(-0.8, len(rows) + 0.2)
    ax.set_xlabel("session time since opening (s)")
    ax.set_title("Timeline: steps, feedback (green approve, red disapprove), markers")
    return _png(fig)


def fig_feedback(d: SessionData) -> Optional[str]:
    plt = _plt()
    feedback = d.by_kind.get("feedback", [])
    if not feedback:
        return None
    import numpy as np
    trainers = sorted({r.feedback.trainer for r in feedback})
    times = [d.rel(r.feedback.event_session_ns) for r in feedback]
    end = max(times + [d.rel(d.session.closed_session_ns) if d.session.closed_session_ns else 0.0])
    start = min(0.0, min(times))
    width = max(1.0, (end - start) / 30)
    edges = np.arange(start, end + width, width)
    if len(edges) < 2:
        edges = np.array([start, start + width])
    fig, (a1, a2) = plt.subplots(1, 2, figsize=(11, 3.4))
    for t in trainers:
        ts = [d.rel(r.feedback.event_session_ns) for r in feedback if r.feedback.trainer == t]
        counts, _ = np.histogram(ts, bins=edges)
        a1.step(edges[:-1], counts / width * 60, where="post", marker="o", markersize=3, label=t)
    a1.set_xlabel("session time since opening (s)")
    a1.set_ylabel("feedback per minute")
    a1.set_title(f"Feedback rate per trainer ({width:.0f} s bins)")
    a1.legend(fontsize=8)
    values = sorted({r.feedback.value for r in feedback})
    x = np.arange(len(values))
    w = 0.8 / max(1, len(trainers))
    for i, t in enumerate(trainers):
        c = collections.Counter(r.feedback.value for r in feedback if r.feedback.trainer == t)
        a2.bar(x + i * w, [c[v] for v in values], width=w, label=t)
    a2.set_xticks(x + w * (len(trainers) - 1) / 2)
    a2.set_xticklabels([f"{v:g}" for v in values])
    a2.set_xlabel("value")
    a2.set_ylabel("count")
    a2.set_title("Feedback values per trainer")
    a2.legend(fontsize=8)
    return _png(fig)


def _kernel_pdf(kernel: records_pb2.DelayKernel, xs):
    """The kernel's density on xs (seconds), or None (SciPy absent, kind unknown)."""
    try:
        from scipy import stats
    except ImportError:
        return None
    kind = kernel.WhichOneof("kind")
    if kind == "gamma":
        g = kernel.gamma
        return stats.gamma.pdf(xs, g.shape, loc=g.shift_ns / NS, scale=g.scale_s)
    if kind == "lognormal":
        g = kernel.lognormal
        import math
        return stats.lognorm.pdf(xs, g.sigma, loc=g.shift_ns / NS, scale=math.exp(g.mu))
    if kind == "ex_gaussian":
        g = kernel.ex_gaussian
        return stats.exponnorm.pdf(xs, g.tau_s / g.sigma_s, loc=g.mu_s, scale=g.sigma_s)
    if kind == "exponential":
        g = kernel.exponential
        return stats.expon.pdf(xs, loc=g.shift_ns / NS, scale=1 / g.rate_per_s)
    if kind == "uniform":
        g = kernel.uniform
        return stats.uniform.pdf(xs, loc=g.min_ns / NS, scale=(g.max_ns - g.min_ns) / NS)
    return None


def fig_calibrations(d: SessionData) -> Optional[str]:
    plt = _plt()
    cals = d.by_kind.get("calibration", [])
    if not cals:
        return None
    import numpy as np
    fig, axes = plt.subplots(1, len(cals), figsize=(4.2 * len(cals), 3.2), squeeze=False)
    for ax, r in zip(axes[0], cals):
        c = r.calibration
        delays = list(c.delays_s)
        if delays:
            ax.hist(delays, bins=min(20, max(5, len(delays) // 3)), density=True,
                    color="#c9d6e8", edgecolor="#5b7aa5", label="measured delays")
            xs = np.linspace(0, max(delays) * 1.3, 300)
            pdf = _kernel_pdf(c.kernel, xs)
            if pdf is not None:
                ax.plot(xs, pdf, color="#c0392b", label="fitted")
        ax.set_title(f"{c.trainer}: {c.kernel_description}", fontsize=8)
        ax.set_xlabel("delay (s)")
        ax.set_ylabel("density")
        ax.legend(fontsize=7)
    fig.suptitle("Calibration fits (delay between a move and the trainer's answer)")
    return _png(fig)


def fig_credit(d: SessionData) -> Optional[str]:
    plt = _plt()
    credit = d.by_kind.get("credit", [])
    labels = d.by_kind.get("label", [])
    if not credit and not labels:
        return None
    fig, (a1, a2) = plt.subplots(1, 2, figsize=(11, 3.2))
    if credit:
        a1.hist([r.credit.credit for r in credit], bins=20, color="#8fb3d9", edgecolor="#3b6ea5")
    a1.set_xlabel("credit share per (feedback, step)")
    a1.set_ylabel("count")
    a1.set_title(f"Credit distribution ({len(credit)} shares)")
    if labels:
        a2.hist([r.label.value for r in labels], bins=20, color="#b5d9a8", edgecolor="#3f7a2c")
    a2.set_xlabel("label value")
    a2.set_ylabel("steps")
    a2.set_title(f"Label distribution ({len(labels)} labels)")
    return _png(fig)


def fig_clocks(d: SessionData) -> Optional[str]:
    plt = _plt()
    models = d.by_kind.get("clock_model", [])
    if not models:
        return None
    fig, ax = plt.subplots(figsize=(11, 3.2))
    by_client = collections.defaultdict(list)
    for r in models:
        by_client[r.clock_model.client_id].append(
            (d.rel(r.written_session_ns), max(r.clock_model.uncertainty_ns, 1) / 1e6))
    for client, pts in sorted(by_client.items()):
        ax.step([p[0] for p in pts], [p[1] for p in pts], where="post", marker="o",
                markersize=3, label=client)
    ax.set_yscale("log")
    ax.set_xlabel("session time since opening (s)")
    ax.set_ylabel("uncertainty (ms)")
    ax.set_title("Clock uncertainty per client (at each model update)")
    ax.legend(fontsize=7)
    return _png(fig)


# ---------------------------------------------------------------- HTML

_STYLE = """
body { font-family: sans-serif; margin: 2em; color: #222; max-width: 1100px; }
h1 { font-size: 1.5em; } h2 { font-size: 1.15em; margin-top: 1.6em; border-bottom: 1px solid #ccc; }
table { border-collapse: collapse; margin: 0.5em 0; } td, th { padding: 2px 10px; text-align: left; }
th { background: #eef; } tr:nth-child(even) td { background: #f6f6f6; }
.ok { color: #1d7a2e; font-weight: bold; } .bad { color: #b02a1a; font-weight: bold; }
.none { color: #777; font-weight: bold; } pre { background: #f4f4f4; padding: 0.6em; white-space: pre-wrap; }
img { max-width: 100%; } .note { color: #555; font-size: 0.9em; }
"""


def _e(x) -> str:
    return html.escape(str(x))


def _utc(ns: int) -> str:
    if not ns:
        return "-"
    t = datetime.datetime.fromtimestamp(ns / NS, tz=datetime.timezone.utc)
    return t.strftime("%Y-%m-%d %H:%M:%S.%f")[:-3] + " UTC"


def _table(headers: List[str], rows: List[List]) -> str:
    out = ["<table><tr>" + "".join(f"<th>{_e(h)}</th>" for h in headers) + "</tr>"]
    for row in rows:
        out.append("<tr>" + "".join(f"<td>{_e(c)}</td>" for c in row) + "</tr>")
    out.append("</table>")
    return "\n".join(out)


def _figure(title: str, png: Optional[str], empty: str) -> str:
    if png is None:
        return f"<h2>{_e(title)}</h2><p class='note'>{_e(empty)}</p>"
    return (f"<h2>{_e(title)}</h2><img class='figure' alt='{_e(title)}' "
            f"src='data:image/png;base64,{png}'>")


def _page(title: str, body: List[str]) -> str:
    now = datetime.datetime.now(tz=datetime.timezone.utc).strftime("%Y-%m-%d %H:%M UTC")
    return ("<!DOCTYPE html>\n<html lang='en'><head><meta charset='utf-8'>"
            f"<title>{_e(title)}</title><style>{_STYLE}</style></head><body>\n"
            + "\n".join(body)
            + f"\n<p class='note'>Made by tickmark.report at {now}. Times are session time "
              "(the server's clock anchored to UTC when the session opened).</p>"
              "\n</body></html>\n")


def session_html(d: SessionData, audit: Dict[str, str]) -> str:
    s, sm = d.session, d.summary
    fb = d.by_kind.get("feedback", [])
    steps = d.by_kind.get("step", [])
    unmatched = d.by_kind.get("unmatched", [])
    reasons = collections.Counter(r.unmatched.reason for r in unmatched)
    late_fb = sum(1 for r in fb if r.feedback.late)
    late_steps = sum(1 for r in steps if r.step.late)
    body = [f"<h1>Session {_e(s.id)}: {_e(s.title)}</h1>"]
    info = [["state", "open" if s.state == records_pb2.SESSION_STATE_OPEN else "closed"],
            ["opened", _utc(s.opened_session_ns)], ["closed", _utc(s.closed_session_ns)],
            ["records", s.last_sequence], ["default kernel", sm.default_kernel or "-"]]
    if s.study:
        info.append(["study", s.study + (f" ({sm.study_name})" if sm.study_name else "")])
    if s.condition:
        info.append(["condition", s.condition])
    if s.participants:
        info.append(["participants", ", ".join(s.participants)])
    body.append(_table(["", ""], info))
    body.append("<h2>Counts</h2>")
    body.append(_table(["what", "count"], [
        ["feedback", len(fb)], ["steps", len(steps)],
        ["late feedback", late_fb], ["late steps", late_steps],
        ["unmatched (no credit)", len(unmatched)],
        ["probes", sm.probe_count], ["rejected probes", sm.rejected_probe_count],
        ["markers", len(d.by_kind.get("marker", []))],
        ["calibrations (measured or applied)", len(d.by_kind.get("calibration", []))],
    ]))
    if reasons:
        body.append(_table(["unmatched reason", "count"], sorted(reasons.items())))
    trainers = collections.defaultdict(lambda: [0, 0, 0, 0])
    for r in fb:
        t = trainers[r.feedback.trainer]
        t[0] += 1
        t[1] += r.feedback.value > 0
        t[2] += r.feedback.value < 0
        t[3] += r.feedback.late
    if trainers:
        body.append(_table(["trainer", "feedback", "approve", "disapprove", "late"],
                           [[k] + v for k, v in sorted(trainers.items())]))
    body.append(_figure("Timeline", fig_timeline(d), "No steps, feedback or markers."))
    body.append(_figure("Feedback per trainer", fig_feedback(d), "No feedback."))
    body.append(_figure("Calibration fits", fig_calibrations(d),
                        "No calibration was measured in or applied to this session."))
    body.append(_figure("Credit and labels", fig_credit(d), "No credit or labels."))
    body.append(_figure("Clock uncertainty", fig_clocks(d), "No clock model updates."))
    css = {"verified": "ok", "FAILED": "bad"}.get(audit["state"], "none")
    body.append("<h2>Audit</h2>")
    body.append(f"<p>Hash chain: <span class='{css}' id='audit-state'>{_e(audit['state'])}</span>"
                "</p>")
    if audit.get("detail"):
        body.append(f"<pre>{_e(audit['detail'])}</pre>")
    if sm.HasField("receipt"):
        r = sm.receipt
        body.append("<p>Close receipt (Ed25519, docs/audit.md): signed "
                    f"<span id='receipt'>{_e(r.signed_utc)}</span>, last sequence "
                    f"{r.last_sequence}, head hash {_e(r.head_hash.hex())}.</p>")
    else:
        body.append("<p>No close receipt (the session is open, or was closed before receipts "
                    "existed).</p>")
    return _page(f"tickmark session {s.id}", body)


def study_html(study: admin_pb2.Study, sessions: Dict[str, SessionData]) -> str:
    plt = _plt()
    body = [f"<h1>Study {_e(study.id)}: {_e(study.name)}</h1>"]
    if study.description:
        body.append(f"<p>{_e(study.description)}</p>")
    body.append(_table(["", ""], [
        ["created", _utc(study.created_session_ns)],
        ["journal", f"{study.last_sequence} records, head {study.head_hash.hex()[:16]}"],
        ["participants", ", ".join(study.participants) or "-"]]))
    body.append("<h2>Conditions</h2>")
    body.append(_table(["condition", "kernel", "pinned", "allowed lateness (ms)", "values",
                        "notes"],
                       [[c.name, c.default_kernel or "(server default)",
                         "yes" if c.pin_kernels else "no",
                         f"{c.allowed_lateness_ns / 1e6:g}" if c.allowed_lateness_ns else "-",
                         " ".join(f"{v:g}" for v in c.feedback_values) or "-", c.notes]
                        for c in study.conditions]))
    if study.HasField("schedule"):
        body.append(f"<h2>Schedule ({_e(study.schedule.design)})</h2>")
        order = {p: i for p, i in study.schedule.assignment.items()}
        body.append(_table(["participant", "order"],
                           [[p, " → ".join(study.schedule.rows[order[p]].conditions)]
                            for p in study.participants if p in order]))
    rows = []
    per_condition = collections.defaultdict(list)
    for e in study.sessions:
        d = sessions.get(e.session_id)
        if d is None:
            continue
        fb = d.by_kind.get("feedback", [])
        labels = d.by_kind.get("label", [])
        rows.append([e.session_id, e.condition, ", ".join(e.participants), len(fb),
                     len(d.by_kind.get("step", [])), sum(r.feedback.late for r in fb),
                     len(d.by_kind.get("unmatched", [])), len(labels)])
        per_condition[e.condition].append(d)
    body.append("<h2>Sessions</h2>")
    body.append(_table(["session", "condition", "participants", "feedback", "steps", "late",
                        "unmatched", "labels"], rows))
    if per_condition:
        names = [c.name for c in study.conditions if c.name in per_condition]
        fig, (a1, a2) = plt.subplots(1, 2, figsize=(11, 3.4))
        a1.bar(names, [sum(len(d.by_kind.get("feedback", [])) for d in per_condition[n])
                       for n in names], color="#8fb3d9")
        a1.set_ylabel("feedback")
        a1.set_title("Feedback per condition (all sessions)")
        data = [[r.label.value for d in per_condition[n] for r in d.by_kind.get("label", [])]
                for n in names]
        if any(data):
            a2.boxplot([x if x else [0.0] for x in data], labels=names)
        a2.set_ylabel("label value")
        a2.set_title("Label values per condition")
        body.append(_figure("Conditions compared", _png(fig), ""))
    else:
        body.append("<p class='note'>No sessions under this study yet.</p>")
    return _page(f"tickmark study {study.id}", body)


# ---------------------------------------------------------------- main


def main(argv: Optional[List[str]] = None) -> int:
    p = argparse.ArgumentParser(
        prog="python3 -m tickmark.report",
        description="Writes a session's report or a study's summary as one self-contained "
                    "HTML file (figures embedded).")
    p.add_argument("--server", default=os.environ.get("TICKMARK_SERVER", "127.0.0.1:7461"))
    p.add_argument("--token-file", help="operator or session token file "
                                        "(default: $TICKMARK_TOKEN)")
    p.add_argument("--insecure", action="store_true", help="plaintext to a non-loopback server")
    p.add_argument("--ca-file", help="CA certificate for TLS")
    which = p.add_mutually_exclusive_group(required=True)
    which.add_argument("--session", help="session id (s-...)")
    which.add_argument("--study", help="study id (y-...): a summary across its sessions")
    p.add_argument("--out", required=True, help="HTML file to write")
    p.add_argument("--cli", help="the tickmark CLI, for the audit status "
                                 "(`tickmark audit verify`)")
    p.add_argument("--ledger", help="the ledger file (or a copy) to check the session's chain "
                                    "in; without it the audit status is \"not checked\"")
    args = p.parse_args(argv)
    try:
        token = read_token(token_file=args.token_file)
    except (OSError, ValueError) as e:
        print(f"tickmark.report: {e}", file=sys.stderr)
        return 2
    channel = open_channel(args.server, ca_file=args.ca_file, insecure=args.insecure)
    try:
        if args.session:
            data = load_session(channel, token, args.session)
            audit = audit_status(args.cli, args.ledger, args.session)
            page = session_html(data, audit)
        else:
            study = load_study(channel, token, args.study)
            sessions = {e.session_id: load_session(channel, token, e.session_id)
                        for e in study.sessions}
            page = study_html(study, sessions)
    except grpc.RpcError as e:
        print(f"tickmark.report: {e.code().name}: {e.details()}", file=sys.stderr)
        return 1
    finally:
        channel.close()
    tmp = args.out + ".tmp"
    with open(tmp, "w", encoding="utf-8") as f:
        f.write(page)
    os.replace(tmp, args.out)
    print(f"report written to {args.out}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
