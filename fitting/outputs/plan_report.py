"""Outputs of a measurement plan: ``plan.csv``, the plain-text summary, the notebook view and
the HTML report with the planned-vs-uniform plot.

``plan.csv`` uses the scan's own probe columns, one row per probe::

    coherent_photons,thermal_photons,shots,probe

so ``povmfit simulate DETECTOR --probes plan.csv`` and an acquisition script read it as it
is. Photon numbers are written with Python's shortest round-trip representation. The plot
draws the first target figure's predicted standard error against the total shots for the
planned proportions and for equal shots on the uniform grid (log-log axes; the target as a
dashed line; a calibration floor flattens both curves).
"""
from __future__ import annotations

import html
import math
from pathlib import Path

import numpy as np

from povmfit.fitting.data.files import atomic_write_text
from povmfit.fitting.display import format_number, html_block, html_table, text_table
from povmfit.fitting.outputs import plots

__all__ = ["write_plan_csv", "format_plan", "plan_html_block", "plan_figure", "write_plan_report", "PLAN_COLUMNS"]

PLAN_COLUMNS = ("coherent_photons", "thermal_photons", "shots", "probe")


def write_plan_csv(plan, path) -> Path:
    """Write the probes of ``plan`` to ``path`` (CSV, atomically); returns the path."""
    path = Path(path)
    lines = [",".join(PLAN_COLUMNS)]
    for a, t, n, label in zip(plan.coherent_photons, plan.thermal_photons, plan.shots, plan.labels):
        lines.append(f"{float(a)!r},{float(t)!r},{int(n)},{label}")
    atomic_write_text(path, "\n".join(lines) + "\n")
    return path


def _duration(seconds) -> str:
    if seconds is None:
        return "n/a"
    if seconds < 120:
        return f"{seconds:.3g} s"
    if seconds < 7200:
        return f"{seconds / 60:.3g} min"
    return f"{seconds / 3600:.3g} h"


def _probe_table(plan):
    header = ["probe", "coherent photons", "thermal photons", "shots", "purpose"]
    rows = [[label, f"{a:g}", f"{t:g}", f"{int(n):,}", p] for label, a, t, n, p in
            zip(plan.labels, plan.coherent_photons, plan.thermal_photons, plan.shots, plan.purposes)]
    return header, rows


def _figure_table(plan):
    header = ["figure", "value", "predicted stderr", "statistical", "calibration", "floor", "target", "met"]
    rows = []
    for name, fig in plan.figures.items():
        met = "" if fig["met"] is None else ("yes" if fig["met"] else "NO")
        rows.append([name, format_number(fig["value"], 4), format_number(fig["stderr"], 3),
                     format_number(fig["stat_stderr"], 3), format_number(fig["calibration_stderr"], 3),
                     format_number(fig["floor"], 3) if fig["floor"] else "0",
                     "" if fig["target"] is None else format_number(fig["target"], 3), met])
    return header, rows


def _heading(plan) -> list[str]:
    calibration = ("probes taken as exact" if plan.calibration_uncertainty is None
                   else f"probe calibration {plan.calibration_uncertainty:g} relative (1 sigma)")
    uniform = plan.uniform
    lines = [
        f"Measurement plan for {plan.model.spec} ({calibration})",
        f"{plan.n_probes} probes, {plan.total_shots:,} shots in total"
        + (f", {_duration(plan.bench_time_s)} at {plan.shots_per_second:g} shots/s" if plan.shots_per_second else ""),
        f"candidates: {plan.candidates['count']} probes, coherent {plan.candidates['coherent_range'][0]:g}"
        f"-{plan.candidates['coherent_range'][1]:g} and thermal {plan.candidates['thermal_range'][0]:g}"
        f"-{plan.candidates['thermal_range'][1]:g} photons; continuous optimum {plan.optimal_total:,.0f} shots",
    ]
    if uniform["total_shots"] is not None:
        lines.append(f"equal shots on a uniform grid of {len(uniform['coherent_photons'])} probes would need "
                     f"{uniform['total_shots']:,.0f} shots ({uniform['ratio']:.3g} x the plan)")
    else:
        lines.append("the uniform grid compared with cannot reach the targets")
    cross = plan.cross_check
    if cross["requested"]:
        lines.append(f"cross-check: {cross['added_probes']} probes and {cross['added_shots']:,} shots added; "
                     f"{cross['displacements']} displacements at two or more thermal levels")
    return lines


def format_plan(plan) -> str:
    """The plan as plain text: heading, probes, predicted figures, notes."""
    parts = _heading(plan) + ["", text_table(*_probe_table(plan)), "", text_table(*_figure_table(plan))]
    if plan.notes:
        parts += [""] + [f"note: {note}" for note in plan.notes]
    return "\n".join(parts)


def plan_html_block(plan) -> str:
    """Notebook view: heading, notes and the two tables."""
    heading = _heading(plan)
    return html_block(heading[0], heading[1:] + [f"note: {n}" for n in plan.notes],
                      [html_table(*_probe_table(plan)), html_table(*_figure_table(plan))])


def _log_ticks(lo: float, hi: float):
    """Ticks at powers of ten, or at 1, 2 and 5 times them over less than three decades."""
    decades = range(math.floor(math.log10(lo)), math.ceil(math.log10(hi)) + 1)
    steps = (1,) if len(decades) > 4 else (1, 2, 5)
    return [(m * 10.0**d, f"{m}e{d}" if abs(d) >= 4 else f"{m * 10.0**d:g}")
            for d in decades for m in steps if lo <= m * 10.0**d <= hi]


def plan_figure(plan) -> str:
    """SVG: predicted standard error of the first target figure against total shots."""
    curve = plan.curve
    totals = np.asarray(curve["total_shots"], dtype=float)
    planned = np.asarray(curve["planned_stderr"], dtype=float)
    uniform = np.array([np.nan if v is None else v for v in curve["uniform_stderr"]], dtype=float)
    target = plan.targets[curve["figure"]]
    entries = [{"text": "planned design", "colour": plots.outcome_colour(0), "dash": ""},
               {"text": "equal shots on the uniform grid", "colour": plots.outcome_colour(1), "dash": "7 3.5"},
               {"text": "target", "colour": "#444", "dash": "1.5 2.5"}]
    floor = plan.figures[curve["figure"]]["floor"]
    if floor:
        entries.append({"text": "calibration floor (infinitely many shots)", "colour": "#d62728", "dash": "7 2.5 1.5 2.5"})
    parts, legend_height = plots.legend([(None, entries)], 70, 8, plots.FIGURE_WIDTH - 80)
    values = np.concatenate([planned, uniform[np.isfinite(uniform)], [target], [floor] if floor else []])
    y_lo, y_hi = np.log10(values.min()) - 0.1, np.log10(values.max()) + 0.1
    x_lo, x_hi = np.log10(totals.min()), np.log10(totals.max())
    panel = plots.Panel((80, 24 + legend_height, plots.FIGURE_WIDTH - 100, 380), (x_lo, x_hi), (y_lo, y_hi))
    xticks = [(math.log10(v), t) for v, t in _log_ticks(totals.min(), totals.max())]
    yticks = [(math.log10(v), t) for v, t in _log_ticks(10**y_lo, 10**y_hi)]
    if len(yticks) < 2:
        yticks = [(y, f"{10**y:.2g}") for y in np.linspace(y_lo, y_hi, 5)]
    panel.axes(xticks, yticks, "total shots (log scale)", f"predicted stderr of {curve['figure']} (log scale)")
    panel.line(np.log10(totals), np.log10(planned), plots.outcome_colour(0), 1.8)
    panel.line(np.log10(totals), np.log10(uniform), plots.outcome_colour(1), 1.8, "7 3.5")
    panel.hline(math.log10(target), "#444", 1.0, "1.5 2.5")
    if floor:
        panel.hline(math.log10(floor), "#d62728", 1.0, "7 2.5 1.5 2.5")
    marks = [(plan.total_shots, plots.outcome_colour(0), 0)]
    if plan.uniform["total_shots"]:
        marks.append((plan.uniform["total_shots"], plots.outcome_colour(1), 1))
    for total, colour, shape in marks:
        panel.points(np.array([math.log10(total)]), np.array([math.log10(target)]), colour, shape)
    parts.append(panel.svg())
    return plots.svg_document(plots.FIGURE_WIDTH, panel.y + panel.height + 52,
                           "Predicted standard error against total shots: planned and uniform designs", parts)


_STYLE = (
    "body{font-family:system-ui,-apple-system,'Segoe UI',Helvetica,Arial,sans-serif;margin:0 auto;max-width:1100px;"
    "padding:1rem 2rem;color:#1d1d1f;line-height:1.45}h1{border-bottom:2px solid #444}h2{margin-top:2rem;"
    "border-bottom:1px solid #bbb}table{border-collapse:collapse;margin:.6rem 0}th,td{padding:.2rem .7rem;"
    "border-bottom:1px solid #ddd;text-align:right}th:first-child,td:first-child{text-align:left}"
    "figure{margin:1rem 0}figcaption{color:#555;font-size:.9rem}svg{max-width:100%;height:auto}"
)


def _page(title: str, sections: list[tuple[str, str]]) -> str:
    """A self-contained page; ``sections`` are (heading, already-escaped HTML body) pairs."""
    e = html.escape
    body = "".join(f"<section><h2>{e(heading)}</h2>{content}</section>" for heading, content in sections)
    return (f'<!DOCTYPE html><html lang="en"><head><meta charset="utf-8"><title>{e(title)}</title>'
            f"<style>{_STYLE}</style></head><body><h1>{e(title)}</h1>{body}</body></html>\n")


def write_plan_report(plan, path) -> Path:
    """Write the HTML report (summary, probes, figures, plot inline as SVG) atomically."""
    path = Path(path)
    e = html.escape
    overview = "".join(f"<p>{e(line)}</p>" for line in _heading(plan))
    overview += "".join(f"<p><strong>note:</strong> {e(note)}</p>" for note in plan.notes)
    caption = ("Predicted standard error of the first target figure against the total number of shots, for the "
               "planned proportions and for equal shots on the uniform grid; markers: the shots each needs to "
               "reach the target. A probe-calibration floor flattens both curves.")
    figure = f"<figure>{plots.inline_svg(plan_figure(plan))}<figcaption>{e(caption)}</figcaption></figure>"
    sections = [("Plan", overview), ("Probes", html_table(*_probe_table(plan))),
                ("Predicted figures", html_table(*_figure_table(plan))), ("Planned and uniform", figure)]
    atomic_write_text(path, _page(f"Measurement plan: {plan.model.spec}", sections))
    return path
