"""Outputs of a batch: ``figures.csv``, ``figures.parquet``, ``sweeps.csv`` and ``batch_report.html``.

The report has one SVG figure per numeric condition: a panel per datasheet figure (value
against the condition, error bars = the 95 % interval of each scan), one series per
combination of the text conditions (colour and marker), and, against the swept bias, the
plateau edges and the dark-limit crossing as vertical lines. Probabilities spanning more than
a decade are drawn on a logarithmic axis. Tables follow: the sweep figures, every scan
(linked to its own report, with its conditions and the well-known metadata keys of its
sidecar), and the scans that were refused or failed with their reasons.
Everything taken from the data is HTML-escaped; the page loads nothing from the network.
"""
from __future__ import annotations

import html
import io
import math
from pathlib import Path

import numpy as np

from povmfit.fitting.data.files import atomic_write_bytes, atomic_write_text
from povmfit.fitting.data.metadata import KNOWN_KEYS
from povmfit.fitting.outputs import plots
from povmfit.fitting.outputs.plots import DASHES, FIGURE_WIDTH, svg_document, legend, linear_ticks, Panel, panel_boxes
from povmfit.fitting.outputs.report import render_html

__all__ = ["write_batch_outputs", "condition_figure"]

_LABELS = {"efficiency": "efficiency", "vacuum_click_probability": "vacuum click probability",
           "dark_count_rate_hz": "dark count rate (Hz)", "crosstalk_probability": "crosstalk probability"}
_LOG_FIGURES = ("vacuum_click_probability", "dark_count_rate_hz")


def write_batch_outputs(result, out_dir: Path, report: bool = True) -> dict:
    """Write the batch-level files for a ``BatchResult`` into ``out_dir``; returns {name: Path}."""
    out_dir = Path(out_dir)
    frame = result.to_dataframe()
    files = {"figures_csv": out_dir / "figures.csv", "figures_parquet": out_dir / "figures.parquet"}
    atomic_write_text(files["figures_csv"], frame.to_csv(index=False))
    buffer = io.BytesIO()
    frame.to_parquet(buffer, index=False)
    atomic_write_bytes(files["figures_parquet"], buffer.getvalue())
    if result.sweeps:
        files["sweeps_csv"] = out_dir / "sweeps.csv"
        atomic_write_text(files["sweeps_csv"], result.sweeps_dataframe().to_csv(index=False))
    if report:
        files["batch_report"] = out_dir / "batch_report.html"
        atomic_write_text(files["batch_report"], batch_report_html(result, frame))
    return files


# ----- the figure -----------------------------------------------------------------------------
def _groups(frame, text_columns) -> list[tuple[str, np.ndarray]]:
    """(label, row mask) per combination of the text conditions, in order of appearance."""
    if not text_columns:
        return [("all scans", np.ones(len(frame), dtype=bool))]
    keys = [tuple(str(v) for v in values) for values in frame[text_columns].itertuples(index=False)]
    order = list(dict.fromkeys(keys))
    return [(", ".join(f"{c} {v}" for c, v in zip(text_columns, key)), np.array([k == key for k in keys]))
            for key in order]


def _log_ticks(lo: float, hi: float) -> list[tuple[float, str]]:
    return [(float(d), f"1e{d}") for d in range(math.floor(lo), math.ceil(hi) + 1)]


def condition_figure(frame, condition: str, figures: list[str], text_columns: list[str], marks: list[dict]) -> str:
    """SVG: each figure against ``condition``, one series per text-condition group.

    ``frame`` holds the ok scans' rows (``FIGURE_value``, ``FIGURE_ci95_lo/hi``); ``marks``
    are vertical lines {``x``, ``group`` (label or None), ``text``, ``figure``} drawn on that figure's panel.
    """
    groups = _groups(frame, text_columns)
    entries = [{"text": label, "colour": plots.outcome_colour(j), "dash": "", "shape": j} for j, (label, _) in enumerate(groups)]
    parts, legend_height = legend([("series" if text_columns else None, entries)], 70, 8, FIGURE_WIDTH - 80)
    if marks:
        kinds = list(dict.fromkeys(m["text"] for m in marks))
        parts2, extra = legend([("lines", [{"text": t, "colour": "#444", "dash": DASHES[1 + i % 3]} for i, t in enumerate(kinds)])],
                                70, 8 + legend_height, FIGURE_WIDTH - 80)
        parts += parts2
        legend_height += extra
    boxes, lowest, height = panel_boxes(len(figures), 50 + legend_height, 80, 70, 200.0)
    x = frame[condition].to_numpy(dtype=float)
    xlim = _pad(x)
    for i, (name, box) in enumerate(zip(figures, boxes)):
        value = frame[f"{name}_value"].to_numpy(dtype=float)
        lo, hi = frame[f"{name}_ci95_lo"].to_numpy(dtype=float), frame[f"{name}_ci95_hi"].to_numpy(dtype=float)
        positive = value[np.isfinite(value) & (value > 0)]
        log = name in _LOG_FIGURES and positive.size >= 2 and positive.max() / positive.min() > 10
        if log:
            floor = positive.min() / 10
            value, lo, hi = (np.log10(np.where(a > 0, a, floor)) for a in (value, lo, hi))
        ylim = _pad(np.concatenate([value, lo, hi]))
        panel = Panel(box, xlim, ylim)
        yticks = _log_ticks(*ylim) if log else linear_ticks(*ylim, 5)
        panel.axes(linear_ticks(*xlim, 6), yticks, condition if lowest[i] else None,
                   _LABELS.get(name, name) + (" (log)" if log else ""), None)
        for j, (label, mask) in enumerate(groups):
            colour = plots.outcome_colour(j)
            order = np.argsort(x[mask], kind="stable")
            gx, gv = x[mask][order], value[mask][order]
            panel.line(gx, gv, colour, 1.0)
            panel.error_bars(gx, lo[mask][order], hi[mask][order], colour)
            panel.points(gx, gv, colour, j)
        kinds = list(dict.fromkeys(m["text"] for m in marks))
        for mark in marks:
            if mark["figure"] == name:
                j = next((k for k, (label, _) in enumerate(groups) if label == mark["group"]), 0)
                panel.line(np.array([mark["x"], mark["x"]]), np.array(ylim), plots.outcome_colour(j), 1.0,
                           DASHES[1 + kinds.index(mark["text"]) % 3])
        parts.append(panel.svg())
    return svg_document(FIGURE_WIDTH, height + 40, f"Figures against {condition}", parts)


def _pad(values) -> tuple[float, float]:
    values = np.asarray(values, dtype=float)
    values = values[np.isfinite(values)]
    if not values.size:
        return 0.0, 1.0
    lo, hi = float(values.min()), float(values.max())
    span = hi - lo if hi > lo else max(abs(hi), 1.0) * 0.1
    return lo - 0.06 * span, hi + 0.06 * span


# ----- HTML -----------------------------------------------------------------------------------
def _e(value) -> str:
    return html.escape(str(value), quote=True)


def _num(value, digits: int = 4) -> str:
    if value is None or (isinstance(value, float) and not math.isfinite(value)):
        return "&ndash;"
    if isinstance(value, (float, np.floating)):
        return _e(f"{float(value):.{digits}g}")
    return _e(value)


def _table(header, rows) -> str:
    head = "".join(f"<th>{_e(h)}</th>" for h in header)
    body = "".join("<tr>" + "".join(f"<td>{c}</td>" for c in row) + "</tr>" for row in rows)
    return f'<table class="wide"><thead><tr>{head}</tr></thead><tbody>{body}</tbody></table>'


def _group_label(group: dict, text_columns) -> str | None:
    keys = [c for c in text_columns]
    if not keys:
        return "all scans"
    return ", ".join(f"{c} {group.get(c)}" for c in keys)


def _marks(result, text_columns) -> list[dict]:
    marks = []
    for sweep in result.sweeps:
        label = _group_label(sweep["group"], text_columns)
        for name, text in (("start", "plateau edges"), ("end", "plateau edges")):
            figure = sweep.get(name)
            if figure is not None and not figure.get("open") and math.isfinite(figure["value"]):
                marks.append({"x": figure["value"], "group": label, "text": text, "figure": "efficiency"})
        crossing = sweep.get("dark_limit_bias")
        if crossing is not None and math.isfinite(crossing["value"]):
            marks.append({"x": crossing["value"], "group": label, "text": f"dark limit {crossing['limit']:g} reached",
                          "figure": "vacuum_click_probability"})
    return marks


def _sweep_rows(result) -> list[list[str]]:
    rows = []
    for sweep in result.sweeps:
        group = ", ".join(f"{k} {v}" for k, v in sweep["group"].items()) or "all scans"
        cells = [_e(group), _num(sweep["scans"])]
        for name in ("start", "end", "efficiency", "dark_limit_bias"):
            figure = sweep.get(name)
            if figure is None:
                cells.append("&ndash;")
                continue
            text = f"{_num(figure['value'])} ± {_num(figure['stderr'], 2)}" if math.isfinite(figure["value"]) else "&ndash;"
            if figure.get("open"):
                text = f"{_num(figure['value'])} (open)"
            cells.append(text)
        notes = [sweep.get("note")] + [sweep.get(n, {}).get("note") for n in ("start", "end", "dark_limit_bias")]
        cells.append(_e("; ".join(n for n in notes if n)))
        rows.append(cells)
    return rows


def metadata_columns(frame, conditions) -> list[str]:
    """The figures table's columns that are well-known metadata keys but not conditions."""
    return [key for key in KNOWN_KEYS if key in frame.columns and key not in conditions]


def batch_report_html(result, frame) -> str:
    manifest = result.manifest
    text_columns = list(manifest.text)
    ok = frame[frame["status"] == "ok"]
    figures = [n for n in ("efficiency", "vacuum_click_probability", "dark_count_rate_hz", "crosstalk_probability")
               if f"{n}_value" in ok and ok[f"{n}_value"].notna().any()]
    counts = frame["status"].value_counts().to_dict()
    options = result.options
    summary = [f"<p>{len(frame)} scans from <code>{_e(manifest.source)}</code>: "
               + ", ".join(f"{_e(n)} {_e(s)}" for s, n in counts.items()) + ".</p>",
               _table(["option", "value"], [[_e(k), _e("default" if v is None else v)] for k, v in options.items()])]
    sections = [("Summary", "".join(summary))]
    if result.sweeps:
        bias = options.get("bias")
        caption = (f"<p class=\"caption\">Plateau: the bias range around the best efficiency where it stays within "
                   f"{_num(100 * options['plateau'], 3)} % of the (bias-corrected) maximum, ends interpolated linearly; "
                   "open = the plateau reaches the edge of the sweep. Uncertainties from 4000 parametric draws of the "
                   "scans' statistical errors (the probe calibration is common to a sweep and cancels). Dark limit: the "
                   "bias where the vacuum click probability first reaches the limit (log-linear interpolation).</p>")
        sections.append((f"Sweep of {bias}", _table(["group", "scans", "plateau start", "plateau end", "plateau efficiency",
                                                     "dark limit reached at", "note"], _sweep_rows(result)) + caption))
    marks = _marks(result, text_columns)
    blocks = []
    for condition in manifest.numeric:
        if ok.empty or not figures:
            break
        svg = condition_figure(ok, condition, figures, text_columns, marks if condition == options.get("bias") else [])
        blocks.append(f"<figure>{plots.inline_svg(svg)}<figcaption>{_e(', '.join(_LABELS.get(f, f) for f in figures))} "
                      f"against {_e(condition)}; error bars: 95 % intervals of each scan; one series per "
                      f"{_e(', '.join(text_columns) or 'batch')}.</figcaption></figure>")
    if blocks:
        sections.append(("Figures against conditions", "".join(blocks)))
    described = [*manifest.conditions, *metadata_columns(frame, manifest.conditions)]
    head = ["scan", *described, "status", "model", *[_LABELS.get(f, f) for f in figures], "fit p", "cross-check"]
    rows = []
    for row in frame.to_dict("records"):
        link = _e(row["scan"])
        if row["output"]:
            link = f'<a href="{_e(row["output"])}/report.html">{link}</a>'
        rows.append([link, *[_num(row[c]) for c in described], _e(row["status"]), _e(row["model"] or ""),
                     *[f"{_num(row[f + '_value'])} ± {_num(row[f + '_stderr'], 2)}" for f in figures],
                     _num(row["gof_p_value"], 3), _e(row["cross_check"])])
    sections.append(("Scans", _table(head, rows)))
    bad = [[_e(r["scan"]), *[_num(r[c]) for c in manifest.conditions], _e(r["status"]), _e(r["reason"])]
           for r in frame.to_dict("records") if r["status"] in ("refused", "failed", "not_converged")]
    sections.append(("Refused scans", _table(["scan", *manifest.conditions, "status", "reason"], bad) if bad
                     else "<p>No scan was refused.</p>"))
    return render_html(f"Batch report: {Path(manifest.source).name}", sections)
