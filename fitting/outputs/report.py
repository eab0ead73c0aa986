"""The fit report: one self-contained ``report.html`` plus the plots as SVG files.

``write_report(out_dir, scan, result, sheet, comparison, cross)`` writes

- ``report.html``: sections Figures, Model verdict, Outcome probabilities, Residuals, POVM,
  Wigner functions, Cross-check, Provenance. Plots are inline SVG (vector, text kept as
  text), the style sheet is inline; the page loads nothing from the network. Every text
  taken from the data (file names, model specs, verdicts, options, probe labels) is
  HTML-escaped.
- ``plots/NAME.svg`` for every plot (the same drawing as on the page).

Conventions: photon numbers are mean photons per shot at the reference plane; ``alpha`` is
the complex amplitude of the displacement and Wigner cross-sections are drawn against
Re(alpha) (quadrature q = sqrt(2) Re(alpha)); W is normalised so that the identity has
W = 1/pi. Observed frequencies carry Wilson score intervals at one standard deviation
(E. B. Wilson, J. Am. Stat. Assoc. 22, 209 (1927)), which stay inside [0, 1] and do not
collapse at zero counts. Residuals are Pearson-standardised:
(observed - expected) / sqrt(shots q (1 - q)).

The pointwise and smoothed Wigner values come from ``cross["pointwise"]`` and
``cross["smoothed"]`` (``pointwise_wigner`` results: ``alpha`` (n_points,) complex,
``values`` and ``stderr`` (n_outcomes, n_points)). A detector's elements are phase
insensitive, so a point at amplitude alpha is drawn at sign(Re alpha) |alpha| on the real
axis (+ when Re(alpha) = 0); the smoothed curve is drawn from its real-axis points.
"""
from __future__ import annotations

import html
import json
import math
from pathlib import Path

import numpy as np

from povmfit.models import choose_cutoff, povm_wigner, probe_distributions_numpy

from povmfit.fitting.outputs import plots
from povmfit.fitting.data.files import atomic_write_text

__all__ = ["write_report", "curve_cutoff", "standardised_residuals", "wilson_interval", "model_curves", "wigner_series", "render_html"]

_MAX_CURVE_LEVELS = 4
_GRID_POINTS = 160


# ----- data for the figures ----------------------------------------------------------------
def wilson_interval(counts, shots, z: float = 1.0):
    """Wilson score interval of a binomial proportion; arrays broadcast. Returns (lo, hi)."""
    counts = np.asarray(counts, dtype=float)
    shots = np.asarray(shots, dtype=float)
    f = counts / shots
    denominator = 1.0 + z**2 / shots
    centre = (f + z**2 / (2 * shots)) / denominator
    half = z * np.sqrt(f * (1 - f) / shots + z**2 / (4 * shots**2)) / denominator
    return np.clip(centre - half, 0.0, 1.0), np.clip(centre + half, 0.0, 1.0)


def standardised_residuals(scan, predicted) -> np.ndarray:
    """(observed - expected) / sqrt(shots q (1 - q)), shape (n_probes, n_outcomes)."""
    q = np.clip(np.asarray(predicted, dtype=float), 1e-300, 1.0)
    expected = scan.shots[:, None] * q
    return (scan.counts - expected) / np.sqrt(expected * (1.0 - q) + 1e-300)


def _thermal_levels(scan):
    levels, index = np.unique(np.asarray(scan.thermal_photons, dtype=float), return_inverse=True)
    return levels, index


def _probe_points(scan) -> dict:
    levels, index = _thermal_levels(scan)
    lower, upper = wilson_interval(scan.counts, scan.shots[:, None])
    return {
        "mean_photons": np.asarray(scan.coherent_photons + scan.thermal_photons, dtype=float),
        "thermal_level": index,
        "levels": levels,
        "frequency": np.asarray(scan.frequencies, dtype=float),
        "lower": lower,
        "upper": upper,
    }


def _curve_probes(scan, result):
    """Probe settings of the model curves: a grid of coherent photon numbers at each of the
    (up to four) most populated thermal levels, scaled by the fitted probe scale if any."""
    levels, index = _thermal_levels(scan)
    populated = sorted(int(j) for j in np.argsort(-np.bincount(index, minlength=levels.size), kind="stable")[:_MAX_CURVE_LEVELS])
    top = float(np.max(scan.coherent_photons))
    positive = scan.coherent_photons[scan.coherent_photons > 0]
    low = float(positive.min()) / 2 if positive.size else 1e-3
    grid = np.concatenate([[0.0], np.geomspace(low, max(top, 2 * low), _GRID_POINTS)])
    scale = float(result.values.get("probe_scale", 1.0))
    coherent = np.tile(grid, len(populated)) * scale
    thermal = np.repeat(levels[populated], grid.size) * scale
    return levels, populated, grid, coherent, thermal


def curve_cutoff(scan, result) -> int:
    """Photon numbers the model POVM must cover for :func:`model_curves`."""
    return choose_cutoff(*_curve_probes(scan, result)[3:], 1e-10)


def model_curves(scan, result, theta) -> list[dict]:
    """Fitted outcome probabilities along the coherent photon number, at the (up to four)
    most populated thermal levels of the scan. The fitted probe scale, if any, is applied.

    ``theta`` (n_outcomes, n_theta): the fitted model's POVM, covering at least
    :func:`curve_cutoff` photon numbers (a model POVM's column n does not depend on the
    cutoff); q = P @ theta.T is formed in numpy.
    """
    levels, populated, grid, coherent, thermal = _curve_probes(scan, result)
    n_photons = choose_cutoff(coherent, thermal, 1e-10)
    if np.shape(theta)[1] < n_photons:
        raise ValueError(f"the model POVM covers {np.shape(theta)[1]} photon numbers; the curves need {n_photons}")
    distributions = probe_distributions_numpy(coherent, thermal, n_photons)
    q = distributions @ np.asarray(theta, dtype=float)[:, :n_photons].T
    q = q.reshape(len(populated), grid.size, -1)
    return [{"level": j, "mean_photons": grid + levels[j], "probability": q[i]} for i, j in enumerate(populated)]


def wigner_series(alpha, values, stderr=None, real_axis_only: bool = False) -> list[dict]:
    """Per outcome: ``re_alpha`` (sign(Re alpha) |alpha|), ``value``, ``stderr`` arrays.

    Args:
        alpha: (n_points,) complex displacements; values, stderr: (n_outcomes, n_points).
        real_axis_only: keep only points with Im(alpha) = 0 when there are any.
    """
    alpha = np.asarray(alpha, dtype=complex).reshape(-1)
    values = np.asarray(values, dtype=float)
    stderr = np.zeros_like(values) if stderr is None else np.nan_to_num(np.asarray(stderr, dtype=float))
    keep = np.ones(alpha.size, dtype=bool)
    if real_axis_only and np.any(np.abs(alpha.imag) < 1e-9):
        keep = np.abs(alpha.imag) < 1e-9
    radius = np.abs(alpha[keep])
    signed = np.where(alpha[keep].real < 0, -radius, radius)
    return [{"re_alpha": signed, "value": values[k, keep], "stderr": stderr[k, keep]} for k in range(values.shape[0])]


def _wigner_data(scan, cross: dict):
    theta = np.asarray(cross["model_theta"])
    pointwise, smoothed = cross.get("pointwise"), cross.get("smoothed")
    points = wigner_series(pointwise.alpha, pointwise.values, pointwise.stderr) if pointwise is not None else []
    curve = wigner_series(smoothed.alpha, smoothed.values, real_axis_only=True) if smoothed is not None else []
    reach = math.sqrt(float(np.max(scan.coherent_photons)))
    for p in points:
        if p["re_alpha"].size:
            reach = max(reach, float(np.max(np.abs(p["re_alpha"]))))
    reach = max(1.5, 1.1 * reach)
    grid = np.linspace(-reach, reach, 2 * _GRID_POINTS + 1)
    values = np.asarray(povm_wigner(theta, grid + 0j))
    return grid, values, points, curve


# ----- HTML pieces ---------------------------------------------------------------------------
def _e(value) -> str:
    return html.escape(str(value), quote=True)


def _num(value, digits: int = 4) -> str:
    if value is None or (isinstance(value, float) and not math.isfinite(value)):
        return "&ndash;"
    if isinstance(value, (bool, np.bool_)):
        return _e(value)
    if isinstance(value, (int, np.integer)):
        return _e(int(value))
    if isinstance(value, (float, np.floating)):
        return _e(f"{float(value):.{digits}g}")
    return _e(value)


def _table(header: list[str], rows: list[list[str]], cls: str = "") -> str:
    head = "".join(f"<th>{_e(h)}</th>" for h in header)
    body = "".join("<tr>" + "".join(f"<td>{cell}</td>" for cell in row) + "</tr>" for row in rows)
    return f'<table class="{_e(cls)}"><thead><tr>{head}</tr></thead><tbody>{body}</tbody></table>'


def _figure_block(svg: str, caption: str) -> str:
    return f"<figure>{plots.inline_svg(svg)}<figcaption>{_e(caption)}</figcaption></figure>"


def _figures_section(sheet: dict) -> str:
    rows = []
    for name, fig in sheet["figures"].items():
        ci = fig.get("ci95") or [None, None]
        rows.append([_e(name.replace("_", " ")), _num(fig["value"]), _num(fig["stderr"]),
                     _num(fig.get("stat_stderr")), _num(fig.get("calibration_stderr")),
                     f"[{_num(ci[0])}, {_num(ci[1])}]", _e(fig.get("note") or "")])
    out = [_table(["figure", "value", "stderr (combined)", "statistical", "calibration", "95 % interval", "note"], rows)]
    calibration = sheet.get("calibration") or {}
    if calibration.get("note"):
        out.append(f'<p class="note"><strong>Calibration:</strong> {_e(calibration["note"])}</p>')
    elif calibration.get("included"):
        out.append(f"<p>Probe calibration uncertainty included: relative 1-sigma "
                   f"{_num(calibration.get('relative_uncertainty'))}.</p>")
    params = [[_e(n), _num(p["value"]), _num(p["stderr"]), _num(p.get("stat_stderr")),
               _num(p.get("calibration_stderr")), f"[{_num(p['ci95'][0])}, {_num(p['ci95'][1])}]",
               _e(p.get("ci_method", ""))] for n, p in sheet["parameters"].items()]
    out.append("<h3>Model parameters</h3>")
    out.append(_table(["parameter", "value", "stderr", "statistical", "calibration", "95 % interval", "interval"], params))
    gof = sheet["goodness_of_fit"]
    converged = "" if gof.get("converged", True) else " <strong>The optimiser did not converge.</strong>"
    out.append(f"<p>Goodness of fit: deviance {_num(gof['deviance'])} on {_num(gof['dof'])} degrees of freedom, "
               f"p = {_num(gof['p_value'], 3)}; photon-number cutoff {_num(gof.get('photon_cutoff'))}.{converged}</p>")
    return "".join(out)


def _verdict_section(sheet: dict, comparison) -> str:
    out = [f'<p class="verdict">{_e(sheet.get("verdict") or "")}</p>']
    rows = []
    for row in sheet.get("model_comparison") or []:
        rows.append([_e(row["model"]), _num(row.get("parameters")), _num(row.get("deviance")), _num(row.get("dof")),
                     _num(row.get("p_value"), 3), _num(row.get("aic")), _num(row.get("bic")),
                     _num(row.get("delta_aic"), 3), _num(row.get("delta_bic"), 3), _num(row.get("weight"), 3),
                     _num(row.get("cv_deviance"))])
    out.append(_table(["model", "k", "deviance", "dof", "p", "AIC", "BIC", "dAIC", "dBIC", "weight", "CV"], rows, "wide"))
    out.append("<p class=\"caption\">k: number of model parameters; p: goodness-of-fit p-value of the deviance; "
               "CV: held-out-probe predictive deviance (computed for up to three leading candidates within 10 of the best BIC); "
               "weight: Akaike weight.</p>")
    chosen = getattr(getattr(comparison, "chosen", None), "spec", None)
    # the tests that add a feature to, or remove one from, the chosen model; all are in datasheet.json
    tests = [t for t in getattr(comparison, "tests", None) or [] if chosen in (t["null"], t["alternative"])]
    if tests:
        rows = [[_e(t["null"]), _e(t["alternative"]), _e(t["feature"]), _num(t["statistic"]), _e(t["reference"]),
                 _num(t["p_value"], 3), "yes" if t["feature_needed"] else "no"] for t in tests]
        out.append("<h3>Likelihood-ratio tests around the chosen model</h3>")
        out.append(_table(["null", "alternative", "feature", "statistic", "reference distribution", "p", "needed"],
                          rows, "wide"))
        out.append("<p class=\"caption\">A switched-off feature sits on the boundary of its range, so its "
                   "statistic is referred to the 50:50 mixture of chi2_0 and chi2_1 (Self &amp; Liang 1987); "
                   "the unequal split adds interior parameters (plain chi2). Every test is listed in "
                   "datasheet.json.</p>")
    if getattr(comparison, "skipped", None):
        items = "".join(f"<li>{_e(spec)}: {_e(reason)}</li>" for spec, reason in comparison.skipped.items())
        out.append(f"<p>Candidates the scan cannot identify:</p><ul>{items}</ul>")
    return "".join(out)


def _size(value) -> int:
    return sum(_size(v) for v in value) if isinstance(value, (list, tuple)) else 1


def _flatten(data: dict, prefix: str = "") -> list[tuple[str, object]]:
    items = []
    for key, value in data.items():
        name = f"{prefix}{key}"
        if isinstance(value, dict):
            items += _flatten(value, name + ".")
        elif isinstance(value, (list, tuple)) and _size(value) > 8:
            items.append((name, f"{_size(value)} numbers (see datasheet.json)"))
        else:
            items.append((name, value))
    return items


def _cell(value) -> str:
    if isinstance(value, (list, tuple)):
        return _e(json.dumps([v if not isinstance(v, float) else float(f"{v:.4g}") for v in value], default=str))
    return _num(value)


def _cross_section(summary: dict) -> str:
    summary = summary or {}
    if not summary:
        return "<p>No cross-check was run.</p>"
    out = [f'<p class="verdict">{_e(summary.get("verdict") or "no verdict")}</p>']
    rows = [[_e(k), _cell(v)] for k, v in _flatten({k: v for k, v in summary.items() if k != "verdict"})]
    if rows:
        out.append(_table(["quantity", "value"], rows))
    return "".join(out)


def _provenance_section(sheet: dict, scan) -> str:
    prov = sheet.get("provenance") or {}
    rows = [["input file", _e(prov.get("input_file", scan.source))],
            ["SHA-256", f"<code>{_e(prov.get('input_sha256') or 'none (data given in memory)')}</code>"],
            ["software", _e(prov.get("software", ""))],
            ["created (UTC)", _e(prov.get("created_utc", ""))],
            ["probes", _num(scan.n_probes)], ["outcomes", _num(scan.n_outcomes)],
            ["shots in total", _num(int(np.sum(scan.shots)))]]
    rows += [[f"option {_e(k)}", _e("default" if v is None else v)] for k, v in (prov.get("options") or {}).items()]
    return _table(["item", "value"], rows)


_STYLE = """
body{font-family:system-ui,-apple-system,"Segoe UI",Helvetica,Arial,sans-serif;margin:0 auto;max-width:1100px;
padding:1rem 2rem;color:#1d1d1f;line-height:1.45}
h1{border-bottom:2px solid #444;padding-bottom:.3rem}h2{margin-top:2.2rem;border-bottom:1px solid #bbb}
table{border-collapse:collapse;margin:.6rem 0;font-size:.88rem}th,td{border:1px solid #ccc;padding:.25rem .5rem;
text-align:left;vertical-align:top}th{background:#eef1f5}tbody tr:nth-child(even){background:#f8f9fb}
table.wide{display:block;overflow-x:auto}figure{margin:1rem 0}figure svg{display:block;width:100%;
height:auto;border:1px solid #ddd}figcaption,.caption{font-size:.85rem;color:#444}.note{background:#fff6d6;
border-left:4px solid #e0a800;padding:.4rem .7rem}.verdict{font-weight:600}code{font-size:.8rem;word-break:break-all}
nav a{margin-right:.8rem}
"""

SECTIONS = ("Figures", "Model verdict", "Outcome probabilities", "Residuals", "POVM", "Wigner functions",
            "Cross-check", "Provenance")


def render_html(title: str, sections: list[tuple[str, str]]) -> str:
    """Assemble the page; ``sections`` are (heading, already-escaped HTML body) pairs."""
    anchors = [(h, h.lower().replace(" ", "-")) for h, _ in sections]
    nav = "".join(f'<a href="#{a}">{_e(h)}</a>' for h, a in anchors)
    body = "".join(f'<section id="{a}"><h2>{_e(h)}</h2>{content}</section>'
                   for (h, a), (_, content) in zip(anchors, sections))
    return (f'<!DOCTYPE html><html lang="en"><head><meta charset="utf-8"><title>{_e(title)}</title>'
            f"<style>{_STYLE}</style></head><body><h1>{_e(title)}</h1><nav>{nav}</nav>{body}</body></html>\n")


def _saturation(cross: dict) -> str:
    return str(getattr(cross.get("pointwise"), "saturation", "?"))


# ----- the report ------------------------------------------------------------------------------
def _save_plot(out_dir: Path, name: str, svg: str, files: dict) -> str:
    path = out_dir / "plots" / f"{name}.svg"
    atomic_write_text(path, svg)
    files[f"plot_{name}_svg"] = path
    return svg


def write_report(out_dir, scan, result, sheet: dict, comparison, cross: dict) -> dict:
    """Write ``report.html`` and ``plots/*.svg`` into ``out_dir``; return {name: Path}."""
    out_dir = Path(out_dir)
    files: dict = {}
    n_outcomes = scan.n_outcomes
    model_theta, model_se = np.asarray(cross["model_theta"]), np.asarray(cross["model_stderr"])

    probes = _probe_points(scan)
    curves = model_curves(scan, result, cross.get("curve_theta", model_theta))
    svg_prob = _save_plot(out_dir, "outcome_probabilities", plots.outcome_probabilities_figure(probes, curves, n_outcomes), files)

    z = standardised_residuals(scan, result.predicted)
    labels = list(scan.labels) if scan.labels else None
    svg_res = _save_plot(out_dir, "residuals", plots.residuals_figure(probes["mean_photons"], z, labels), files)

    recon = cross["reconstruction"]
    fig = plots.povm_figure(model_theta, model_se, np.asarray(recon.theta), np.asarray(recon.stderr), np.asarray(recon.constrained))
    svg_povm = _save_plot(out_dir, "povm", fig, files)

    grid, values, points, smoothed = _wigner_data(scan, cross)
    svg_wig = _save_plot(out_dir, "wigner", plots.wigner_figure(grid, values, points, smoothed), files)

    levels = ", ".join(f"{t:.3g}" for t in probes["levels"])
    constrained = np.flatnonzero(recon.constrained)
    span = f"{constrained.min()}..{constrained.max()}" if constrained.size else "none"
    has_points = any(p["value"].size for p in points)
    sections = [
        ("Figures", _figures_section(sheet)),
        ("Model verdict", _verdict_section(sheet, comparison)),
        ("Outcome probabilities", _figure_block(svg_prob, (
            "Observed outcome frequencies (points, Wilson 1-sigma intervals) against the probe mean photon number, "
            "with the fitted model (lines); one colour per outcome. Filled circles and solid lines: coherent probes; "
            f"other markers (hollow) and line styles: displaced-thermal probes. Thermal parts in this scan: {levels} photons."))),
        ("Residuals", _figure_block(svg_res, (
            "Standardised residuals (observed - expected) / sqrt(shots q (1 - q)) per probe and outcome; dashed lines "
            "at +-2. An adequate model leaves them scattered around zero without structure."))),
        ("POVM", _figure_block(svg_povm, (
            "P(outcome k | n photons): fitted model (line, band = 95 % delta-method interval) and model-free "
            f"reconstruction (points, bootstrap standard errors), drawn only for photon numbers the probes constrain ({span})."))),
        ("Wigner functions", _figure_block(svg_wig, (
            "Wigner functions of the POVM elements along the real axis. Axis convention: alpha is the complex amplitude "
            "of the displacement, the horizontal axis is Re(alpha) at Im(alpha) = 0, and the quadrature is "
            "q = sqrt(2) Re(alpha). Normalisation: the identity has W = 1/pi. Line: model; "
            + ("points: pointwise values from displaced-thermal probes (phase insensitive, so drawn at +-|alpha|); dashed: smoothed. "
               f"The pointwise values assume the response is constant above M = {_saturation(cross)} photons (as many unknowns as "
               "thermal levels), so with few thermal levels they can sit off the exact model curve."
               if has_points else "no pointwise values were computed (they need displacements probed at two or more thermal levels).")))),
        ("Cross-check", _cross_section(cross.get("summary"))),
        ("Provenance", _provenance_section(sheet, scan)),
    ]
    title = f"Detector report: {sheet['model']['spec']}"
    files["report"] = out_dir / "report.html"
    atomic_write_text(files["report"], render_html(title, sections))
    return files
