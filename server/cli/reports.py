"""What the `vigil` verbs print: the end-of-run summary, rehearsal reports and figures.

Formatting only; the figures themselves come from the lab (server/lab/).
"""

from __future__ import annotations

import sys
from collections.abc import Callable, Sequence

import numpy as np

from server.lab.supervisor import BoxRun


def summary_table(runs: Sequence[BoxRun]) -> str:
    """The end-of-run summary: one row per box, with the rules that fired and how often."""
    rows = [("box", "animal", "session", "trials", "rewards", "end reason", "rule firings")]
    for run in runs:
        end = run.ended
        rules = run.session.rules
        counts = rules.firings() if rules is not None else {}
        fired = ", ".join(f"{name} x{n}" for name, n in counts.items() if n) or "-"
        rows.append((
            run.config.name, run.config.animal, str(run.session_id),
            str(end.trials if end else run.session.trials_done),
            str(end.rewards if end else run.session.rewards),
            end.reason if end else "not ended", fired,
        ))  # fmt: skip
    widths = [max(len(r[i]) for r in rows) for i in range(len(rows[0]))]
    return "\n".join("  ".join(c.ljust(w) for c, w in zip(r, widths)).rstrip() for r in rows)


def progress_bar(stream=sys.stderr) -> Callable[[int, int], None] | None:
    if not stream.isatty():
        return None

    def show(done: int, total: int) -> None:
        width = 30
        filled = width * done // max(total, 1)
        stream.write(f"\r[{'#' * filled}{'.' * (width - filled)}] {done}/{total} animals")
        if done == total:
            stream.write("\n")
        stream.flush()

    return show


def human_report(result: dict) -> str:
    s = result["summary"]
    k = result.get("sessions_per_animal", 1)
    days = f", {k} sessions each" if k > 1 else ""
    lines = [f"protocol '{result['protocol']}', seed {result['seed']}, {s['animals']} virtual animals{days}", ""]
    lines.append(f"{'animal':<14}{'trials':>7}{'rewards':>9}{'minutes':>9}{'reversals':>10}  criterion    end")
    for r in result["animals"]:
        if r["criterion_reached"] is None:
            crit = "-"
        elif r["criterion_reached"]:
            crit = f"trial {r['trials_to_criterion']}" + (f" (s{r['sessions_to_criterion']})" if k > 1 else "")
        else:
            crit = "never"
        lines.append(
            f"{r['animal']:<14}{r['trials']:>7}{r['rewards']:>9}{r['duration_s'] / 60:>9.1f}"
            f"{r['reversals']:>10}  {crit:<12} {r['end_reason']}"
        )
        for f in r.get("firing_log", []):
            values = ", ".join(f"{k} {v:.3g}" if isinstance(v, float) else f"{k} {v}" for k, v in f["values"].items())
            did = "; ".join(", ".join(f"{k} {v}" for k, v in a.items()) for a in f["actions"])
            lines.append(f"    s{f['session']} trial {f['trial']:>4}  {f['rule']}: {did}  ({values})")
    lines.append("")

    def fmt(spread: dict | None, scale: float = 1.0) -> str:
        if not spread or spread["median"] is None:
            return "-"
        return f"median {spread['median'] / scale:.1f} (IQR {spread['q1'] / scale:.1f}-{spread['q3'] / scale:.1f})"

    lines.append(f"trials per session     {fmt(s['trials'])}")
    lines.append(f"rewards per session    {fmt(s['rewards'])}   (for food-restriction planning)")
    lines.append(f"session minutes        {fmt(s['duration_s'], 60.0)}")
    lines.append(f"reversals per session  {fmt(s['reversals_per_session'])}")
    if s["trials_to_criterion"] is not None:
        lines.append(f"trials to criterion    {fmt(s['trials_to_criterion'])}")
        if k > 1:
            lines.append(f"sessions to criterion  {fmt(s['sessions_to_criterion'])}")
        lines.append(f"never reached          {s['fraction_never_reaching_criterion']:.0%} of animals")
    if s["rule_firings"]:
        lines.append("rule firings           " + ", ".join(f"{n}: {c}" for n, c in s["rule_firings"].items()))
    for name, fit in (s.get("recovery") or {}).items():
        r = "-" if fit["pearson_r"] is None else f"{fit['pearson_r']:.2f}"
        lines.append(
            f"estimate of {name:<10} tracks the trait with r = {r}; its 95 % interval holds it for "
            f"{fit['coverage_95']:.0%} of {fit['animals']} animals"
        )
    return "\n".join(lines)


def criterion_figure_svg(result: dict) -> str:
    """A histogram of trials to criterion across the cohort, as a standalone SVG."""
    from xml.sax.saxutils import escape

    values = [r["trials_to_criterion"] for r in result["animals"] if r["trials_to_criterion"] is not None]
    never = sum(1 for r in result["animals"] if r["criterion_reached"] is False)
    width, height, left, bottom = 640, 360, 60, 50
    plot_w, plot_h = width - left - 20, height - bottom - 40
    title = escape(f"{result['protocol']}: trials to criterion, {len(result['animals'])} virtual animals")
    parts = [
        f'<svg xmlns="http://www.w3.org/2000/svg" width="{width}" height="{height}" '
        f'viewBox="0 0 {width} {height}" font-family="sans-serif" font-size="12">',
        f'<rect width="{width}" height="{height}" fill="white"/>',
        f'<text x="{left}" y="22" font-size="14">{title}</text>',
    ]
    if values:
        counts, edges = np.histogram(values, bins=min(20, max(1, len(set(values)))))
        top = max(counts) or 1
        bar_w = plot_w / len(counts)
        for i, c in enumerate(counts):
            h = plot_h * c / top
            x = left + i * bar_w
            parts.append(
                f'<rect x="{x:.1f}" y="{40 + plot_h - h:.1f}" width="{bar_w - 2:.1f}" height="{h:.1f}" fill="#4a6fa5"/>'
            )
        for i in (0, len(edges) // 2, len(edges) - 1):
            x = left + plot_w * i / (len(edges) - 1)
            parts.append(f'<text x="{x:.1f}" y="{height - bottom + 18}" text-anchor="middle">{edges[i]:.0f}</text>')
        parts.append(f'<text x="{left - 8}" y="{40 + 4}" text-anchor="end">{top}</text>')
        parts.append(f'<text x="{left - 8}" y="{40 + plot_h}" text-anchor="end">0</text>')
    parts.append(f'<line x1="{left}" y1="{40 + plot_h}" x2="{left + plot_w}" y2="{40 + plot_h}" stroke="black"/>')
    parts.append(
        f'<text x="{left + plot_w / 2}" y="{height - 12}" text-anchor="middle">trials to criterion (animals)</text>'
    )
    parts.append(f'<text x="{left + plot_w}" y="{height - 12}" text-anchor="end">never reached: {never}</text>')
    parts.append("</svg>")
    return "\n".join(parts) + "\n"
