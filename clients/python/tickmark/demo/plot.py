"""The demo's figure: learning curve and a timeline excerpt (matplotlib)."""

from __future__ import annotations

import collections


def draw(path: str, curve, random_rate: float, observer) -> None:
    import matplotlib
    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    fig, (top, bottom) = plt.subplots(2, 1, figsize=(10, 8))
    xs = [c[0] for c in curve]
    top.plot(xs, [c[1] for c in curve], label="tickmark credit (delay kernel, clock-corrected)",
             color="tab:blue", linewidth=2)
    top.plot(xs, [c[2] for c in curve], label="naive credit (arrival time, latest step)",
             color="tab:orange")
    top.axhline(random_rate, label="random policy", color="gray", linestyle="--")
    top.set_xlabel("feedback received")
    top.set_ylabel("greedy success rate")
    top.set_ylim(-0.02, 1.02)
    top.set_title("Dock rover: reaching the dock, learned from a simulated trainer")
    top.legend(loc="lower right")

    # Timeline excerpt: a few seconds in the middle of the session.
    steps = sorted(observer.steps.items(), key=lambda kv: kv[1][3])
    if len(steps) > 20:
        mid = len(steps) // 2
        window = steps[mid:mid + 14]
        t0 = window[0][1][3]
        t_end = window[-1][1][3]
        starts = {seq: (info[3] - t0) / 1e9 for seq, info in window}
        seqs = [seq for seq, _ in window]
        for i, (seq, info) in enumerate(window):
            end = (window[i + 1][1][3] - t0) / 1e9 if i + 1 < len(window) else starts[seq] + 0.25
            bottom.axvspan(starts[seq], end, color="0.92" if i % 2 else "0.85")
            bottom.text(starts[seq] + 0.01, 1.25, f"{info[2]}\n{info[1]}", fontsize=7, va="bottom")
        # Credited value per step: Σ credit × feedback value (what its label sums).
        value_by_step = collections.defaultdict(float)
        fb_value = {fseq: v[1] for fseq, v in observer.feedback.items()}
        for fseq, sseq, c in observer.credits:
            if sseq in starts:
                value_by_step[sseq] += c * fb_value.get(fseq, 0.0)
        for seq in seqs:
            v = value_by_step[seq]
            if v:
                bottom.bar(starts[seq] + 0.02, v, width=0.2, align="edge",
                           color="tab:green" if v > 0 else "tab:red", alpha=0.5)
        step_start_by_id = {info[2]: starts[seq] for seq, info in window}
        shown = 0
        for fseq, (judged, value, event, arrival) in observer.feedback.items():
            te = (event - t0) / 1e9
            if 0 <= te <= (t_end - t0) / 1e9:
                color = "tab:green" if value > 0 else "tab:red"
                y = 1.15 if value > 0 else -1.15
                bottom.plot([te], [y], marker="^" if value > 0 else "v", color=color,
                            markersize=9, label="feedback at its event time" if shown == 0 else None)
                if judged in step_start_by_id:  # what the simulated trainer judged
                    bottom.annotate("", xy=(step_start_by_id[judged] + 0.12, 0.0), xytext=(te, y),
                                    arrowprops=dict(arrowstyle="->", color=color, alpha=0.4))
                shown += 1
        bottom.axhline(0, color="black", linewidth=0.5)
        bottom.set_ylim(-1.3, 1.5)
        bottom.set_xlabel("session time (s, from the first step shown); shaded: steps (id, action); "
                          "arrows: the step each feedback judged (simulation only)")
        bottom.set_ylabel("credited value (Σ credit × feedback)")
        if shown:
            bottom.legend(loc="upper right")
    fig.tight_layout()
    fig.savefig(path)
