"""The HTML report of a pulse-height tally: every probe's spectrum with the fitted peak model
and the thresholds, the fitted parameters and the misassignment matrix (SVG drawn with the
primitives of :mod:`povmfit.fitting.outputs.plots`; nothing computed with JAX)."""
from __future__ import annotations

import html

import numpy as np
from scipy import stats

from povmfit.models import probe_distributions_numpy

from povmfit.fitting.display import format_uncertain, html_table
from povmfit.fitting.outputs.plots import (FIGURE_WIDTH, svg_document, linear_ticks, Panel, panel_boxes, inline_svg,
                                           outcome_colour)
from povmfit.fitting.tally import spectra as sp

__all__ = ["spectra_figure", "pulse_height_report"]


def _model_density(values: dict, spectrum, x: np.ndarray, n_peaks: int) -> np.ndarray:
    n = np.arange(n_peaks)
    eta = values["efficiency"]
    weights = probe_distributions_numpy([eta * spectrum.coherent_photons], [eta * spectrum.thermal_photons], n_peaks)[0]
    density = stats.norm.pdf(x[:, None], sp.peak_means(values, n)[None, :], sp.peak_widths(values, n)[None, :])
    return density @ weights


def spectra_figure(tally) -> str:
    """One panel per probe: observed density of pulse heights (points), the fitted mixture
    (line) and the thresholds (dashed, coloured as the outcome above them)."""
    spectra = tally.spectra
    boxes, lowest, height = panel_boxes(len(spectra), 30, 70, 60)
    parts = []
    values = tally.values
    for spectrum, box, bottom in zip(spectra, boxes, lowest):
        finite = np.isfinite(spectrum.lo) & np.isfinite(spectrum.hi)
        lo, hi, counts = spectrum.lo[finite], spectrum.hi[finite], spectrum.counts[finite]
        if lo.size == 0:
            continue
        total = max(spectrum.triggers, 1)
        centres, density = 0.5 * (lo + hi), counts / (hi - lo) / total
        occupied = np.nonzero(counts)[0]
        xlim = (float(lo[occupied[0]]), float(hi[occupied[-1]])) if occupied.size else (float(lo[0]), float(hi[-1]))
        grid = np.linspace(*xlim, 600)
        model = _model_density(values, spectrum, grid, tally.n_peaks)
        top = 1.08 * float(max(density.max(), model.max(), 1e-300))
        panel = Panel(box, xlim, (0.0, top))
        for k, cut in enumerate(tally.thresholds, start=1):
            if xlim[0] < cut < xlim[1]:
                panel.line(np.array([cut, cut]), np.array([0.0, top]), outcome_colour(k), 1.0, "4 3")
        panel.points(centres, density, "#555", radius=1.6)
        panel.line(grid, model, "#d62728", 1.5)
        panel.axes(linear_ticks(*xlim, 5), linear_ticks(0.0, top, 4),
                   "pulse height (instrument units, linear)" if bottom else None,
                   "density (linear)" if box[0] < 80 else None,
                   f"{spectrum.label}: {spectrum.coherent_photons:g} coherent + {spectrum.thermal_photons:g} thermal")
        parts.append(panel.svg())
    return svg_document(FIGURE_WIDTH, height + 30, "Pulse-height spectra with the fitted peaks and thresholds", parts)


def _entry(value: float) -> str:
    if value == 0:
        return "0"
    return "<1e-12" if value < 1e-12 else f"{value:.3g}"


def pulse_height_report(tally) -> str:
    """A standalone HTML page (inline SVG, no external references)."""
    rows = [[name, format_uncertain(e["value"], e["stderr"]),
             "fixed" if e["stderr"] is None else f"[{e['ci95'][0]:.6g}, {e['ci95'][1]:.6g}]"]
            for name, e in tally.parameters.items()]
    k_rows = tally.misassignment.shape[0]
    shown = min(tally.misassignment.shape[1], k_rows + 3)
    matrix_rows = [[str(k)] + [_entry(v) for v in tally.misassignment[k, :shown]] for k in range(k_rows)]
    gof = tally.goodness_of_fit
    summary = html.escape(tally.summary())
    corner = "k\u2009\\\u2009m"
    return (
        "<!DOCTYPE html><html lang='en'><head><meta charset='utf-8'><title>povmfit pulse-height tally</title>"
        "<style>body{font-family:DejaVu Sans,Helvetica,Arial,sans-serif;max-width:1000px;margin:auto;padding:1em}"
        "table{border-collapse:collapse}td,th{padding:2px 8px;border-bottom:1px solid #ddd;text-align:right;white-space:nowrap}"
        "pre{white-space:pre-wrap;font-size:12px}svg{max-width:100%;height:auto}</style></head><body>"
        f"<h1>Pulse-height tally</h1><p>{html.escape(tally.probes_file)}: {tally.scan.n_probes} probes, "
        f"outcomes 0..{tally.max_outcome} ({tally.max_outcome} means {tally.max_outcome} or more). Fit: deviance "
        f"{gof['deviance']:.1f} on {gof['dof']} dof (pooled bins), "
        f"{'converged' if gof['converged'] else 'NOT converged'}.</p>"
        f"<h2>Spectra</h2>{inline_svg(spectra_figure(tally))}"
        f"<h2>Peak parameters</h2>{html_table(['parameter', 'value ± stderr', '95 % interval'], rows)}"
        "<p>The efficiency comes from the spectra alone, with the probes taken as exact.</p>"
        f"<h2>Misassignment matrix</h2><p>P(outcome k | m photons registered), first {shown} columns.</p>"
        f"<div style='overflow-x:auto'>{html_table([corner] + [str(m) for m in range(shown)], matrix_rows)}</div>"
        f"<h2>Summary</h2><pre>{summary}</pre></body></html>\n")
