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
import math
from pathlib import Path

import numpy as np

from povmfit.models import choose_cutoff, povm_wigner, probe_distributions_numpy

from povmfit.fitting.display import FIGURE_UNITS, format_interval, format_p_value, format_quantity
from povmfit.fitting.outputs import plots
from povmfit.fitting.data.files import atomic_write_text

__all__ = ["write_report", "curve_cutoff", "standardised_residuals", "wilson_interval", "model_curves", "wigner_series", "render_html"]

_MAX_CURVE_LEVELS = 4
_SEPARATE_OUTCOMES = 5  # outcomes drawn one by one in the outcome plot; the rest summed
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


def outcome_groups(n_outcomes: int) -> list[tuple[str, list[int]]]:
    """(label, outcomes) drawn as one series each: outcomes 0..4 one by one and, with more than
    six outcomes, "5 or more" summed (the plot stays readable)."""
    if n_outcomes <= _SEPARATE_OUTCOMES + 1:
        return [(str(k), [k]) for k in range(n_outcomes)]
    return [(str(k), [k]) for k in range(_SEPARATE_OUTCOMES)] + [
        (f"{_SEPARATE_OUTCOMES} or more", list(range(_SEPARATE_OUTCOMES, n_outcomes)))]


def _grouped(array, groups) -> np.ndarray:
    """Sum the last axis of ``array`` over each group of outcomes."""
    return np.stack([np.asarray(array)[..., outcomes].sum(axis=-1) for _, outcomes in groups], axis=-1)


def _probe_points(scan, groups) -> dict:
    levels, index = _thermal_levels(scan)
    counts = _grouped(scan.counts, groups)
    lower, upper = wilson_interval(counts, scan.shots[:, None])
    return {
        "mean_photons": np.asarray(scan.coherent_photons + scan.thermal_photons, dtype=float),
        "thermal_level": index,
        "levels": levels,
        "frequency": counts / scan.shots[:, None],
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
        return "n/a"
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


def _rounded(stderr: float, unit: str) -> str:
    """An uncertainty part to two significant digits, in the figure's display unit."""
    return format_quantity(float(f"{stderr:.2g}"), None, unit)


def _figures_section(sheet: dict) -> str:
    rows = []
    for name, fig in sheet["figures"].items():
        unit = FIGURE_UNITS.get(name, "")
        parts = ""
        if fig.get("calibration_stderr"):
            parts = (f"statistical {_rounded(fig['stat_stderr'], unit)}, "
                     f"calibration {_rounded(fig['calibration_stderr'], unit)}")
        rows.append([f"<code>{_e(name)}</code>", _e(fig.get("meaning", "")), _e(format_quantity(fig["value"], fig["stderr"], unit)),
                     _e(format_interval(*fig["ci95"], fig["stderr"], unit, reference=fig["value"])), _e(parts),
                     _e(fig.get("note") or "")])
    out = [_table(["figure", "meaning", "value ± standard error", "95 % interval", "uncertainty parts", "note"], rows, "wide")]
    out.append('<p class="caption">The same table as <a href="figures.csv">figures.csv</a>, '
               '<a href="figures.md">figures.md</a> and <a href="figures.tex">figures.tex</a> (numbers in SI base '
               "units there); every figure with more digits in datasheet.json.</p>")
    calibration = sheet.get("calibration") or {}
    if calibration.get("note"):
        out.append(f'<p class="note"><strong>Calibration:</strong> {_e(calibration["note"])}</p>')
    elif calibration.get("included"):
        out.append(f"<p>Probe calibration uncertainty included: relative 1-sigma "
                   f"{_e(format_quantity(calibration.get('relative_uncertainty'), None, '%'))}.</p>")
    params = [[_e(n), _num(p["value"]), _num(p["stderr"]), _num(p.get("stat_stderr")),
               _num(p.get("calibration_stderr")), f"[{_num(p['ci95'][0])}, {_num(p['ci95'][1])}]",
               _e(p.get("ci_method", ""))] for n, p in sheet["parameters"].items()]
    out.append("<h3>Model parameters</h3>")
    out.append(_table(["parameter", "value", "stderr", "statistical", "calibration", "95 % interval", "interval"], params))
    gof = sheet["goodness_of_fit"]
    converged = "" if gof.get("converged", True) else " <strong>The optimiser did not converge.</strong>"
    out.append(f"<p>Goodness of fit: deviance {gof['deviance']:.1f} on {_num(gof['dof'])} degrees of freedom, "
               f"p = {_e(format_p_value(gof['p_value']))}; photon-number cutoff {_num(gof.get('photon_cutoff'))}.{converged}</p>")
    return "".join(out)


_BIC_WINDOW = 10.0  # delta BIC beyond which the evidence against a candidate is very strong


def _fixed(value) -> str:
    """Deviances and information criteria: one decimal."""
    if value is None or not math.isfinite(value):
        return "n/a"
    return _e(f"{value:.1f}")


def _verdict_section(sheet: dict, comparison) -> str:
    out = [f'<p class="verdict">{_e(sheet.get("verdict") or "")}</p>']
    header = ["model", "k", "deviance", "dof", "p", "AIC", "BIC", "dAIC", "dBIC", "weight", "CV"]
    shown, hidden = [], []
    for row in sheet.get("model_comparison") or []:
        cells = [_e(row["model"]), _num(row.get("parameters")), _fixed(row.get("deviance")), _num(row.get("dof")),
                 _e(format_p_value(row.get("p_value"))), _fixed(row.get("aic")), _fixed(row.get("bic")),
                 _fixed(row.get("delta_aic")), _fixed(row.get("delta_bic")), _num(row.get("weight"), 3),
                 _fixed(row.get("cv_deviance"))]
        near = row.get("delta_bic") is not None and row["delta_bic"] <= _BIC_WINDOW
        (shown if row.get("adequate", True) or near else hidden).append(cells)
    out.append(_table(header, shown, "wide"))
    if hidden:
        out.append(f"<details><summary>{len(hidden)} more candidates: inadequate (goodness-of-fit p &lt; 0.01) and more "
                   f"than {_BIC_WINDOW:g} above the best BIC</summary>{_table(header, hidden, 'wide')}</details>")
    out.append("<p class=\"caption\">Shown: the adequate candidates and any within 10 of the best BIC. k: number of "
               "model parameters; p: goodness-of-fit p-value of the deviance; CV: held-out-probe predictive deviance "
               "(computed for up to three leading candidates within 10 of the best BIC); weight: Akaike weight. "
               "Deviances, information criteria and their differences in units of the deviance (dimensionless).</p>")
    chosen = getattr(getattr(comparison, "chosen", None), "spec", None)
    # the tests that add a feature to, or remove one from, the chosen model; all are in datasheet.json
    tests = [t for t in getattr(comparison, "tests", None) or [] if chosen in (t["null"], t["alternative"])]
    if tests:
        rows = [[_e(t["null"]), _e(t["alternative"]), _e(t["feature"]), _fixed(t["statistic"]), _e(t["reference"]),
                 _e(format_p_value(t["p_value"])), "yes" if t["feature_needed"] else "no"] for t in tests]
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


def _cross_section(summary: dict) -> str:
    summary = summary or {}
    if not summary:
        return "<p>No cross-check was run.</p>"
    out = [f'<p class="verdict">Verdict: {_e(summary.get("verdict") or "no verdict")} '
           f'(tension is declared when a p-value falls below {_e(summary.get("level", ""))}).</p>']
    rows = []
    povm = summary.get("povm") or {}
    if povm:
        photons = povm.get("photons_compared") or []
        largest = povm.get("largest") or {}
        rows.append(["POVM: model-free reconstruction of the data against the fitted model",
                     f"n = {photons[0]}..{photons[-1]}" if photons else "none",
                     _fixed(povm.get("chi_square")), _num(povm.get("dof")), _e(format_p_value(povm.get("p_value"))),
                     _e(f"{povm.get('max_abs_z', float('nan')):.2f} at outcome {largest.get('outcome')}, "
                        f"{largest.get('photons')} photons") if largest else "n/a"])
    wigner = summary.get("wigner") or {}
    if wigner:
        largest = wigner.get("largest") or {}
        rows.append(["Wigner: pointwise values of the data against the model through the same estimator",
                     "every probed displacement", _fixed(wigner.get("chi_square")), _num(wigner.get("dof")),
                     _e(format_p_value(wigner.get("p_value"))),
                     _e(f"{wigner.get('max_abs_z', float('nan')):.2f} at outcome {largest.get('outcome')}, "
                        f"Re(alpha) = {largest.get('re_alpha', float('nan')):.3g}") if largest else "n/a"])
    phase = summary.get("phase_insensitivity") or {}
    if phase:
        rows.append(["phase insensitivity: probes differing only in displacement phase", "",
                     _fixed(phase.get("chi_square")), _num(phase.get("dof")), _e(format_p_value(phase.get("p_value"))), ""])
    out.append(_table(["comparison", "where", "chi-square", "dof", "p", "largest |z|"], rows, "wide"))
    notes = [summary.get("povm_comparison"), summary.get("constrained_rule")]
    out.append("<p class=\"caption\">" + " ".join(_e(n[0].upper() + n[1:] + ".") for n in notes if n) +
               " z: difference in units of its standard error; the last outcome is left out of each statistic "
               "(fixed by completeness). Every number is in datasheet.json.</p>")
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
h1{border-bottom:2px solid #444;padding-bottom:.3rem;overflow-wrap:anywhere}h2{margin-top:2.2rem;border-bottom:1px solid #bbb}
table{border-collapse:collapse;margin:.6rem 0;font-size:.88rem}th,td{border:1px solid #ccc;padding:.25rem .5rem;
text-align:left;vertical-align:top}th{background:#eef1f5}tbody tr:nth-child(even){background:#f8f9fb}
table{display:block;overflow-x:auto;max-width:100%}figure{margin:1rem 0}figure svg{display:block;width:100%;
height:auto;border:1px solid #ddd}figcaption,.caption{font-size:.85rem;color:#444}.note{background:#fff6d6;
border-left:4px solid #e0a800;padding:.4rem .7rem}.verdict{font-weight:600}code{font-size:.8rem;word-break:break-all}
nav a{margin-right:.8rem;display:inline-block}table.header td:first-child{font-weight:600}
table.header thead{display:none}details{margin:.4rem 0}summary{cursor:pointer;color:#333}
@media (max-width:700px){body{padding:.5rem .8rem}h1{font-size:1.45rem}table{font-size:.8rem}}
"""

SECTIONS = ("Figures", "Model verdict", "Outcome probabilities", "Residuals", "POVM", "Wigner functions",
            "Cross-check", "Provenance")


def _header(sheet: dict, scan) -> str:
    """Who, what, when and under which conditions: the block under the title."""
    prov = sheet.get("provenance") or {}
    conditions = sheet.get("conditions") or {}
    rows = [["scan file", _e(prov.get("input_file", scan.source))],
            ["analysed (UTC)", _e(prov.get("created_utc", ""))],
            ["model", f"<code>{_e(sheet['model']['spec'])}</code>"]]
    rows += [[_e(key.replace("_", " ")), _e(value)] for key, value in conditions.items()]
    if not conditions:
        rows.append(["conditions", "not given (add them with --meta KEY=VALUE or a SCAN.meta.json file)"])
    return _table(["", ""], rows, "header")


def render_html(title: str, sections: list[tuple[str, str]], header: str = "") -> str:
    """Assemble the page; ``sections`` are (heading, already-escaped HTML body) pairs; ``header``
    (HTML) goes between the title and the navigation."""
    anchors = [(h, h.lower().replace(" ", "-")) for h, _ in sections]
    nav = "".join(f'<a href="#{a}">{_e(h)}</a>' for h, a in anchors)
    body = "".join(f'<section id="{a}"><h2>{_e(h)}</h2>{content}</section>'
                   for (h, a), (_, content) in zip(anchors, sections))
    return (f'<!DOCTYPE html><html lang="en"><head><meta charset="utf-8"><title>{_e(title)}</title>'
            '<meta name="viewport" content="width=device-width, initial-scale=1">'
            f"<style>{_STYLE}</style></head><body><h1>{_e(title)}</h1>{header}<nav>{nav}</nav>{body}</body></html>\n")


def _estimator(reconstruction) -> str:
    if getattr(reconstruction, "method", "least_squares") == "likelihood":
        return "maximum likelihood with a smoothness penalty chosen on held-out probes"
    return "regularised least squares, smoothness chosen by cross-validation"


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
    model_theta, model_se = np.asarray(cross["model_theta"]), np.asarray(cross["model_stderr"])

    groups = outcome_groups(scan.n_outcomes)
    probes = _probe_points(scan, groups)
    curves = [dict(c, probability=_grouped(c["probability"], groups))
              for c in model_curves(scan, result, cross.get("curve_theta", model_theta))]
    svg_prob = _save_plot(out_dir, "outcome_probabilities",
                          plots.outcome_probabilities_figure(probes, curves, len(groups), [g for g, _ in groups]), files)

    z = standardised_residuals(scan, result.predicted)
    labels = list(scan.labels) if scan.labels else [f"coh {a:.3g} th {n:.3g}" for a, n in
                                                   zip(scan.coherent_photons, scan.thermal_photons)]
    svg_res = _save_plot(out_dir, "residuals", plots.residuals_figure(probes["mean_photons"], z, labels), files)

    recon = cross["reconstruction"]
    fig = plots.povm_figure(model_theta, model_se, np.asarray(recon.theta), np.asarray(recon.stderr), np.asarray(recon.constrained))
    svg_povm = _save_plot(out_dir, "povm", fig, files)

    grid, values, points, smoothed = _wigner_data(scan, cross)
    pointwise, model_pointwise = cross.get("pointwise"), cross.get("model_pointwise")
    model_points = (wigner_series(pointwise.alpha, model_pointwise)
                    if pointwise is not None and model_pointwise is not None else None)
    svg_wig = _save_plot(out_dir, "wigner", plots.wigner_figure(grid, values, points, smoothed, model_points), files)

    levels = ", ".join(f"{t:.3g}" for t in probes["levels"])
    constrained = np.flatnonzero(recon.constrained)
    span = f"{constrained.min()}..{constrained.max()}" if constrained.size else "none"
    has_points = any(p["value"].size for p in points)
    sections = [
        ("Figures", _figures_section(sheet)),
        ("Model verdict", _verdict_section(sheet, comparison)),
        ("Outcome probabilities", _figure_block(svg_prob, (
            "Observed outcome frequencies (points, Wilson 1-sigma intervals) against the probe mean photon number, "
            "with the fitted model (lines); one colour per outcome"
            + (f", outcomes {_SEPARATE_OUTCOMES} and above summed" if len(groups) < scan.n_outcomes else "")
            + ". Filled circles and solid lines: coherent probes; other markers (hollow) and line styles: "
            f"displaced-thermal probes. Thermal parts in this scan: {levels} photons. The horizontal axis is "
            "linear near zero and logarithmic above when the probes span more than a factor 20 (its label says which)."))),
        ("Residuals", _figure_block(svg_res, (
            "Standardised residuals (observed - expected) / sqrt(shots q (1 - q)) per probe and outcome; dashed lines "
            "at +-2. An adequate model leaves them scattered around zero without structure."))),
        ("POVM", _figure_block(svg_povm, (
            "P(outcome k | n photons): fitted model (line, band = 95 % delta-method interval) and model-free "
            f"reconstruction ({_estimator(recon)}; points, bootstrap standard errors), drawn only for photon numbers the "
            f"probes constrain ({span}). Each panel has its own vertical range (linear)."))),
        ("Wigner functions", _figure_block(svg_wig, (
            "Wigner functions of the POVM elements along the real axis. Axis convention: alpha is the complex amplitude "
            "of the displacement, the horizontal axis is Re(alpha) at Im(alpha) = 0, and the quadrature is "
            "q = sqrt(2) Re(alpha). Normalisation: the identity has W = 1/pi. Line: the fitted model's exact Wigner function. "
            + ("Hollow points: pointwise values from displaced-thermal probes (phase insensitive, so drawn at +-|alpha|). "
               f"They assume the response is constant above M = {_saturation(cross)} photons (as many unknowns as thermal "
               "levels), so with few thermal levels they can sit off the exact model line, most for high outcomes. The "
               "cross-check therefore compares them with the filled triangles: the same pointwise estimator applied to the "
               "model's exact probabilities; agreement between points and triangles is what the Wigner verdict reports. The "
               "dashed curve, smoothed with the same saturation prior, is a diagnostic of the pointwise values only: it is "
               "not used by the cross-check and need not follow the model line."
               if has_points else "No pointwise values were computed (they need displacements probed at two or more "
               "thermal levels).")))),
        ("Cross-check", _cross_section(cross.get("summary"))),
        ("Provenance", _provenance_section(sheet, scan)),
    ]
    conditions = sheet.get("conditions") or {}
    device = conditions.get("device") or Path(str(scan.source)).stem
    title = f"Detector report: {device}, {sheet['model']['spec']}"
    files["report"] = out_dir / "report.html"
    atomic_write_text(files["report"], render_html(title, sections, _header(sheet, scan)))
    return files
