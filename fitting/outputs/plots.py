"""Figures of the fit report, drawn directly as SVG documents (no plotting library).

Every figure function takes plain arrays (prepared in ``report``) and returns a standalone
SVG document as a string: vector graphics with the text kept as text, no external
references, and no dates or random identifiers, so the same data give the same bytes.
:func:`inline_svg` turns a document into markup for an HTML page. Lengths are CSS pixels;
every figure is ``FIGURE_WIDTH`` wide. Data are drawn inside a nested ``<svg>`` viewport per
panel, which clips them to the panel.

Conventions: photon numbers are mean photons per shot at the reference plane; ``alpha`` is
the complex amplitude of the displacement, plotted along ``Re(alpha)`` (the quadrature is
q = sqrt(2) Re(alpha)); outcome k is drawn in colour ``outcome_colour(k)`` in every figure.
Photon-number axes spanning more than a factor 20 use a symmetric-log scale: linear from 0
to the smallest positive value, logarithmic above.
"""
from __future__ import annotations

import html
import math

import numpy as np

__all__ = [
    "FIGURE_WIDTH", "outcome_colour", "inline_svg", "outcome_probabilities_figure", "residuals_figure",
    "povm_figure", "wigner_figure",
]

FIGURE_WIDTH = 960
_FONT = "DejaVu Sans, Helvetica, Arial, sans-serif"
_CHAR_WIDTH = 0.6  # average glyph width of the sans-serif fonts above, in units of the font size
# the ten-colour qualitative palette common in scientific plots, then its light variants
_DARK = ("#1f77b4", "#ff7f0e", "#2ca02c", "#d62728", "#9467bd", "#8c564b", "#e377c2", "#7f7f7f", "#bcbd22", "#17becf")
_LIGHT = ("#aec7e8", "#ffbb78", "#98df8a", "#ff9896", "#c5b0d5", "#c49c94", "#f7b6d2", "#c7c7c7", "#dbdb8d", "#9edae5")
DASHES = (None, "7 3.5", "1.5 2.5", "7 2.5 1.5 2.5")  # solid, dashed, dotted, dash-dot
_MARKERS = ((0, 0.0), (4, 45.0), (3, -90.0), (4, 0.0), (3, 90.0), (5, -90.0), (6, 0.0), (3, 0.0))  # (sides, turn)
_NS = ' xmlns="http://www.w3.org/2000/svg"'
_SYMLOG_LINEAR_DECADES = 0.5  # width of the linear part of a symmetric-log axis, in decades


def outcome_colour(k: int) -> str:
    """Colour of outcome k as '#rrggbb' (ten dark colours, then ten light ones, repeating)."""
    return (_DARK + _LIGHT)[k % 20]


def inline_svg(document: str) -> str:
    """Markup for an HTML page: the namespace declaration is dropped (HTML parsers set it)."""
    return document.replace(_NS, "", 1)


# ----- primitives ------------------------------------------------------------------------------
def _e(text) -> str:
    return html.escape(str(text), quote=True)


def _f(value: float) -> str:
    return f"{value:.1f}"


def _text_width(text: str, size: float) -> float:
    return _CHAR_WIDTH * size * len(text)


def _text(x, y, text, size=12.0, anchor="middle", colour="#222", rotate=None, weight=None) -> str:
    turn = f' transform="rotate({rotate:g} {_f(x)} {_f(y)})"' if rotate else ""
    bold = f' font-weight="{weight}"' if weight else ""
    return (f'<text x="{_f(x)}" y="{_f(y)}" font-size="{size:g}" text-anchor="{anchor}" fill="{colour}"'
            f"{turn}{bold}>{_e(text)}</text>")


def _stroke(colour, width, dash=None, opacity=None) -> str:
    extra = f' stroke-dasharray="{dash}"' if dash else ""
    extra += f' stroke-opacity="{opacity}"' if opacity is not None else ""
    return f'stroke="{colour}" stroke-width="{width:g}"{extra}'


def _marker_path(x, y, shape: int, radius: float) -> str:
    """Subpaths of one marker shape (index into _MARKERS) at every (x, y) pixel position."""
    sides, turn = _MARKERS[shape % len(_MARKERS)]
    if sides == 0:
        return "".join(f"M{_f(a - radius)} {_f(b)}a{radius:g} {radius:g} 0 1 0 {2 * radius:g} 0"
                       f"a{radius:g} {radius:g} 0 1 0 {-2 * radius:g} 0Z" for a, b in zip(x, y))
    angles = np.radians(turn + 360.0 * np.arange(sides) / sides)
    size = radius * (1.25 if sides < 5 else 1.1)
    dx, dy = size * np.cos(angles), size * np.sin(angles)
    return "".join("M" + "L".join(f"{_f(a + u)} {_f(b + v)}" for u, v in zip(dx, dy)) + "Z" for a, b in zip(x, y))


def _finite_runs(x, y) -> list[tuple[np.ndarray, np.ndarray]]:
    ok = np.isfinite(x) & np.isfinite(y)
    edges = np.flatnonzero(np.diff(np.concatenate([[0], ok.astype(int), [0]])))
    return [(x[a:b], y[a:b]) for a, b in zip(edges[::2], edges[1::2])]


class _Axis:
    """Data -> pixel along one axis: linear, or symmetric log with a linear part below ``threshold``."""

    def __init__(self, lo: float, hi: float, length: float, threshold: float | None = None, flip: bool = False):
        self.threshold, self.length, self.flip = threshold, length, flip
        self.t0, self.t1 = float(self.transform(lo)), float(self.transform(hi))

    def transform(self, values):
        v = np.asarray(values, dtype=float)
        if self.threshold is None:
            return v
        a = np.abs(v) / self.threshold
        return np.sign(v) * np.where(a <= 1, a * _SYMLOG_LINEAR_DECADES, _SYMLOG_LINEAR_DECADES + np.log10(np.maximum(a, 1)))

    def __call__(self, values) -> np.ndarray:
        fraction = (self.transform(values) - self.t0) / (self.t1 - self.t0)
        return (1.0 - fraction if self.flip else fraction) * self.length


class Panel:
    """One plotting area at (x, y) of size (width, height): grid and data inside a clipping
    viewport, frame, ticks and labels around it."""

    def __init__(self, box, xlim, ylim, x_threshold=None):
        self.x, self.y, self.width, self.height = box
        self.px = _Axis(*xlim, self.width, x_threshold)
        self.py = _Axis(*ylim, self.height, flip=True)
        self.back: list[str] = []
        self.data: list[str] = []
        self.front: list[str] = []

    # data, in the order drawn
    def line(self, x, y, colour, width=1.4, dash=None) -> None:
        runs = _finite_runs(self.px(x), self.py(y))
        d = "".join("M" + "L".join(f"{_f(a)} {_f(b)}" for a, b in zip(u, v)) for u, v in runs if u.size > 1)
        if d:
            self.data.append(f'<path d="{d}" fill="none" {_stroke(colour, width, dash)} stroke-linejoin="round"/>')

    def band(self, x, lower, upper, colour, opacity=0.25) -> None:
        ok = np.isfinite(x) & np.isfinite(lower) & np.isfinite(upper)
        if not ok.any():
            return
        u, lo, hi = self.px(x[ok]), self.py(lower[ok]), self.py(upper[ok])
        points = [f"{_f(a)} {_f(b)}" for a, b in zip(np.concatenate([u, u[::-1]]), np.concatenate([lo, hi[::-1]]))]
        self.data.append(f'<path d="M{"L".join(points)}Z" fill="{colour}" fill-opacity="{opacity}"/>')

    def points(self, x, y, colour, shape=0, hollow=False, radius=3.2) -> None:
        ok = np.isfinite(x) & np.isfinite(y)
        if ok.any():
            fill = "white" if hollow else colour
            d = _marker_path(self.px(x[ok]), self.py(y[ok]), shape, radius)
            self.data.append(f'<path d="{d}" fill="{fill}" {_stroke(colour, 1.1)}/>')

    def error_bars(self, x, lower, upper, colour, cap=2.5, width=0.9) -> None:
        ok = np.isfinite(x) & np.isfinite(lower) & np.isfinite(upper) & (upper > lower)
        u, lo, hi = self.px(x[ok]), self.py(lower[ok]), self.py(upper[ok])
        d = "".join(f"M{_f(a)} {_f(b)}V{_f(c)}M{_f(a - cap)} {_f(b)}h{2 * cap:g}M{_f(a - cap)} {_f(c)}h{2 * cap:g}"
                    for a, b, c in zip(u, lo, hi))
        if d:
            self.data.append(f'<path d="{d}" fill="none" {_stroke(colour, width)}/>')

    def bars(self, left, height, bar_width, colour) -> None:
        x0, x1, top, base = self.px(left), self.px(left + bar_width), self.py(height), self.py(0.0)
        d = "".join(f"M{_f(a)} {_f(base)}H{_f(b)}V{_f(t)}H{_f(a)}Z" for a, b, t in zip(x0, x1, top) if np.isfinite(t))
        if d:
            self.data.append(f'<path d="{d}" fill="{colour}"/>')

    def hline(self, value, colour, width=0.8, dash=None) -> None:
        y = float(self.py(value))
        self.data.append(f'<path d="M0 {_f(y)}H{_f(self.width)}" {_stroke(colour, width, dash)}/>')

    # frame and labels
    def axes(self, xticks, yticks, xlabel=None, ylabel=None, title=None, x_minor=(), grid="xy") -> None:
        """Ticks are (value, label) pairs; a label of None draws the tick without text."""
        grid_colour, d_grid, d_ticks = "#e3e3e3", [], []
        bottom = self.y + self.height
        for value, label in xticks:
            u = float(self.px(value))
            if not 0 <= u <= self.width + 0.01:
                continue
            if "x" in grid:
                d_grid.append(f"M{_f(u)} 0V{_f(self.height)}")
            d_ticks.append(f"M{_f(self.x + u)} {_f(bottom)}v4")
            if label is not None:
                self.front.append(_text(self.x + u, bottom + 17, label))
        for value in x_minor:
            u = float(self.px(value))
            if 0 <= u <= self.width:
                d_ticks.append(f"M{_f(self.x + u)} {_f(bottom)}v2.5")
        for value, label in yticks:
            v = float(self.py(value))
            if not -0.01 <= v <= self.height + 0.01:
                continue
            if "y" in grid:
                d_grid.append(f"M0 {_f(v)}H{_f(self.width)}")
            d_ticks.append(f"M{_f(self.x)} {_f(self.y + v)}h-4")
            if label is not None:
                self.front.append(_text(self.x - 7, self.y + v + 4, label, anchor="end"))
        if d_grid:
            self.back.append(f'<path d="{"".join(d_grid)}" {_stroke(grid_colour, 1)}/>')
        self.front.append(f'<path d="{"".join(d_ticks)}" {_stroke("#444", 1)}/>')
        self.front.append(f'<rect x="{_f(self.x)}" y="{_f(self.y)}" width="{_f(self.width)}" height="{_f(self.height)}" '
                          f'fill="none" {_stroke("#444", 1)}/>')
        if xlabel:
            self.front.append(_text(self.x + self.width / 2, bottom + 38, xlabel, size=13.5))
        if ylabel:
            label_x = self.x - 13 - max((_text_width(t, 12) for _, t in yticks if t), default=20)
            self.front.append(_text(label_x, self.y + self.height / 2, ylabel, size=13.5, rotate=-90))
        if title:
            self.front.append(_text(self.x + self.width / 2, self.y - 7, title, size=13.5))

    def svg(self) -> str:
        inner = "".join(self.back + self.data)
        return (f'<svg x="{_f(self.x)}" y="{_f(self.y)}" width="{_f(self.width)}" height="{_f(self.height)}" '
                f'overflow="hidden">{inner}</svg>' + "".join(self.front))


# ----- ticks, limits, legends, documents ------------------------------------------------------
def _number(value: float, decimals: int) -> str:
    text = f"{value:.{decimals}f}"
    if float(text) == 0:
        text = text.lstrip("-")
    return text.replace("-", "\u2212")


def linear_ticks(lo: float, hi: float, target: int = 6) -> list[tuple[float, str]]:
    """Ticks at 1, 2, 2.5 or 5 times a power of ten, about ``target`` of them in [lo, hi]."""
    if not hi > lo:
        return [(lo, f"{lo:.3g}")]
    raw = (hi - lo) / max(target, 1)
    power = 10.0 ** math.floor(math.log10(raw))
    mantissa = next(m for m in (1.0, 2.0, 2.5, 5.0, 10.0) if m * power >= raw * (1 - 1e-9))
    step = mantissa * power
    decimals = max(0, -math.floor(math.log10(step) + 1e-9)) + (1 if mantissa == 2.5 else 0)
    first, last = math.ceil(lo / step - 1e-9), math.floor(hi / step + 1e-9)
    return [(i * step, _number(i * step, decimals)) for i in range(first, last + 1)]


def _symlog_ticks(hi: float, threshold: float) -> tuple[list[tuple[float, str]], list[float]]:
    """Labelled ticks (0 and decades, or 1-2-5 steps when few decades) and minor ticks."""
    decades = range(math.floor(math.log10(threshold)), math.floor(math.log10(hi)) + 1)
    steps = (1,) if len(decades) >= 3 else (1, 2, 5)
    major = [m * 10.0**d for d in decades for m in steps if threshold * (1 - 1e-9) <= m * 10.0**d <= hi * (1 + 1e-9)]
    minor = [m * 10.0**d for d in decades for m in range(2, 10) if threshold <= m * 10.0**d <= hi and m not in steps]
    return [(0.0, "0")] + [(v, f"{v:g}") for v in major], minor


def _limits(*arrays, pad: float = 0.06, include=()) -> tuple[float, float]:
    values = np.concatenate([np.ravel(np.asarray(a, dtype=float)) for a in arrays] + [np.asarray(include, dtype=float)])
    values = values[np.isfinite(values)]
    lo, hi = (float(values.min()), float(values.max())) if values.size else (0.0, 1.0)
    span = hi - lo if hi > lo else max(abs(hi), 1.0)
    return lo - pad * span, hi + pad * span


def legend(groups: list[tuple[str | None, list[dict]]], x: float, y: float, width: float) -> tuple[list[str], float]:
    """Legend rows: every group (heading or None, entries) starts a new row, its entries flow
    left to right and wrap. Returns (parts, height used).

    An entry has ``text`` and optionally ``colour``, ``dash`` (a line; "" for solid),
    ``shape`` and ``hollow`` (a marker), ``patch`` (a filled square), ``band`` (a shaded band).
    """
    parts, row = [], 0
    for heading, entries in groups:
        first = x
        if heading:
            parts.append(_text(x, y + 20 * row + 14.5, heading, size=13, anchor="start", weight="bold"))
            first = x + _text_width(heading, 13) + 14
        left = first
        for entry in entries:
            need = _text_width(entry["text"], 13) + 52
            if left + need > x + width and left > first:
                row, left = row + 1, first
            middle, colour = y + 20 * row + 10, entry.get("colour", "#444")
            if entry.get("patch"):
                parts.append(f'<rect x="{_f(left + 8)}" y="{_f(middle - 6)}" width="14" height="12" fill="{colour}"/>')
            if entry.get("band"):
                parts.append(f'<rect x="{_f(left)}" y="{_f(middle - 6)}" width="30" height="12" fill="{colour}" '
                             'fill-opacity="0.25"/>')
            if "dash" in entry:
                parts.append(f'<path d="M{_f(left)} {_f(middle)}h30" {_stroke(colour, 1.5, entry["dash"])}/>')
            if "shape" in entry:
                fill = "white" if entry.get("hollow") else colour
                parts.append(f'<path d="{_marker_path([left + 15], [middle], entry["shape"], 3.5)}" fill="{fill}" '
                             f'{_stroke(colour, 1.1)}/>')
            parts.append(_text(left + 38, middle + 4.5, entry["text"], size=13, anchor="start"))
            left += need
        row += 1
    return parts, 20 * row


def svg_document(width: float, height: float, title: str, parts: list[str]) -> str:
    return (f'<svg{_NS} width="{width:g}" height="{height:g}" viewBox="0 0 {width:g} {height:g}" '
            f'font-family="{_FONT}" role="img"><title>{_e(title)}</title>'
            f'<rect width="{width:g}" height="{height:g}" fill="white"/>{"".join(parts)}</svg>\n')


def panel_boxes(n_panels: int, top: float, left: float, gap: float, height: float = 175.0):
    """Boxes of a grid of up to three columns; also whether each panel is at the bottom of its column."""
    columns = min(3, n_panels)
    width = (FIGURE_WIDTH - left - 14 - (columns - 1) * gap) / columns
    boxes = [(left + (i % columns) * (width + gap), top + (i // columns) * (height + 36), width, height)
             for i in range(n_panels)]
    lowest = [i + columns >= n_panels for i in range(n_panels)]
    return boxes, lowest, top + math.ceil(n_panels / columns) * (height + 36) + 14


# ----- the figures -------------------------------------------------------------------------------
def outcome_probabilities_figure(probes: dict, curves: list[dict], n_outcomes: int, labels=None) -> str:
    """Observed outcome frequencies against probe mean photon number, with model curves.

    Args:
        probes: ``mean_photons`` (n_probes,) coherent + thermal photons; ``thermal_level``
            (n_probes,) int index into ``levels``; ``levels`` (n_levels,) thermal photons;
            ``frequency``, ``lower``, ``upper`` (n_probes, n_outcomes) observed frequency and
            its 1-sigma interval.
        curves: one dict per drawn thermal level: ``level`` (index), ``mean_photons``
            (n_grid,) and ``probability`` (n_grid, n_outcomes) of the fitted model.
        n_outcomes: series drawn (outcomes, or groups of outcomes); labels: their legend
            texts (default "0", "1", ...).
    """
    levels, photons = probes["levels"], np.asarray(probes["mean_photons"], dtype=float)
    labels = labels or [str(k) for k in range(n_outcomes)]
    outcomes = [{"text": labels[k], "colour": outcome_colour(k), "dash": "", "shape": 0} for k in range(n_outcomes)]
    kinds = [{"text": "coherent" if t == 0 else f"thermal part {t:.3g} photons", "dash": DASHES[j % len(DASHES)] or "",
              "shape": j, "hollow": j > 0} for j, t in enumerate(levels)]
    parts, legend_height = legend([("outcome", outcomes), ("probes", kinds)], 70, 8, FIGURE_WIDTH - 80)
    positive = photons[photons > 0]
    top = float(max(photons.max(), max((c["mean_photons"].max() for c in curves), default=0.0)))
    threshold = float(positive.min()) if positive.size and positive.max() / positive.min() > 20 else None
    axis = _Axis(0.0, top, 1.0, threshold)
    pad = 0.03 * (axis.t1 - axis.t0)
    xlim = (float(_inverse(axis.t0 - pad, threshold)), float(_inverse(axis.t1 + pad, threshold)))
    panel = Panel((70, 24 + legend_height, FIGURE_WIDTH - 84, 440), xlim, (-0.02, 1.02), threshold)
    xticks, minor = _symlog_ticks(top, threshold) if threshold else (linear_ticks(0.0, xlim[1], 8), ())
    scale = (f"symmetric-log scale: linear below {threshold:.3g}, logarithmic above" if threshold else "linear scale")
    panel.axes(xticks, linear_ticks(0.0, 1.0, 5), f"probe mean photon number, coherent + thermal ({scale})",
               "outcome probability (linear)", x_minor=minor)
    for curve in curves:
        for k in range(n_outcomes):
            panel.line(curve["mean_photons"], curve["probability"][:, k], outcome_colour(k), 1.3,
                       DASHES[curve["level"] % len(DASHES)])
    for j in range(len(levels)):
        rows = probes["thermal_level"] == j
        for k in range(n_outcomes):
            colour = outcome_colour(k)
            panel.error_bars(photons[rows], probes["lower"][rows, k], probes["upper"][rows, k], colour)
            panel.points(photons[rows], probes["frequency"][rows, k], colour, j, hollow=j > 0)
    parts.append(panel.svg())
    return svg_document(FIGURE_WIDTH, panel.y + panel.height + 48, "Observed outcome frequencies and fitted model", parts)


def _inverse(t: float, threshold: float | None) -> float:
    """Inverse of the axis transform (for padding the range in transformed units)."""
    if threshold is None:
        return t
    a = abs(t)
    magnitude = a / _SYMLOG_LINEAR_DECADES if a <= _SYMLOG_LINEAR_DECADES else 10 ** (a - _SYMLOG_LINEAR_DECADES)
    return math.copysign(magnitude * threshold, t)


def residuals_figure(mean_photons, residuals, labels=None) -> str:
    """Standardised residuals (observed - expected) / sd per probe and outcome.

    Args:
        mean_photons: (n_probes,) probe mean photon numbers, used to order the probes.
        residuals: (n_probes, n_outcomes) standardised residuals.
        labels: optional probe labels for the x ticks.
    """
    residuals = np.asarray(residuals, dtype=float)
    order = np.argsort(mean_photons, kind="stable")
    n_probes, n_outcomes = residuals.shape
    entries = [{"text": str(k), "colour": outcome_colour(k), "patch": True} for k in range(n_outcomes)]
    parts, legend_height = legend([("outcome", entries)], 70, 8, FIGURE_WIDTH - 80)
    names = [str(labels[i]) for i in order] if labels else [f"{mean_photons[i]:.3g}" for i in order]
    names = [n if len(n) <= 18 else n[:17] + "\u2026" for n in names]
    step = max(1, math.ceil(n_probes / 40))
    # rotated labels: generous width estimate, since symbols such as '<' are wider than average glyphs
    label_room = 1.25 * max(_text_width(n, 12) for n in names[::step]) * math.sin(math.radians(55)) + 14
    reach = max(3.0, 1.08 * float(np.nanmax(np.abs(residuals), initial=0.0)))
    panel = Panel((70, 24 + legend_height, FIGURE_WIDTH - 84, 300), (-0.6, n_probes - 0.4), (-reach, reach))
    panel.axes([], linear_ticks(-reach, reach, 8), None, "standardised residual", grid="y")
    position = np.arange(n_probes, dtype=float)
    for i in range(1, n_probes, 2):  # alternate shading groups the bars of one probe
        x0, x1 = panel.px(i - 0.5), panel.px(i + 0.5)
        panel.data.append(f'<rect x="{_f(x0)}" y="0" width="{_f(x1 - x0)}" height="{_f(panel.height)}" fill="#f3f4f7"/>')
    width = 0.84 / n_outcomes
    for k in range(n_outcomes):
        panel.bars(position - 0.42 + k * width, residuals[order, k], width, outcome_colour(k))
    for level in (-2, 2):
        panel.hline(level, "#555", 0.9, "6 3")
    panel.hline(0, "#111", 0.9)
    bottom = panel.y + panel.height
    for i in range(0, n_probes, step):
        x = panel.x + float(panel.px(i))
        parts.append(f'<path d="M{_f(x)} {_f(bottom)}v4" {_stroke("#444", 1)}/>')
        parts.append(_text(x + 3, bottom + 14, names[i], anchor="end", rotate=-55))
    xlabel = "probe (ordered by mean photon number)" + ("" if labels else "; tick = mean photons")
    parts.append(panel.svg())
    parts.append(_text(panel.x + panel.width / 2, bottom + label_room + 24, xlabel, size=13.5))
    return svg_document(FIGURE_WIDTH, bottom + label_room + 36, "Standardised residuals", parts)


def povm_figure(model_theta, model_stderr, reconstruction_theta, reconstruction_stderr, constrained) -> str:
    """Parametric and model-free POVM elements against photon number, one panel per outcome.

    Only photon numbers where ``constrained`` is True (the probes inform them) are drawn.
    Arrays have shape (n_outcomes, n_photons); ``constrained`` (n_photons,) bool. The panels
    share the horizontal axis; each has its own vertical range (linear), so small elements
    are not flattened.
    """
    photons = np.flatnonzero(constrained).astype(float)
    n_outcomes = model_theta.shape[0]
    entries = [{"text": "model", "colour": "#444", "dash": ""},
               {"text": "model, 95 % interval", "colour": "#444", "band": True},
               {"text": "model-free reconstruction", "colour": "#111", "shape": 0, "hollow": True}]
    parts, legend_height = legend([(None, entries)], 70, 8, FIGURE_WIDTH - 80)
    boxes, lowest, height = panel_boxes(n_outcomes, 50 + legend_height, 70, 48)
    xlim = (photons.min() - 0.6, photons.max() + 0.6) if photons.size else (-0.6, 0.6)
    xticks = [(v, t) for v, t in linear_ticks(max(xlim[0], 0), xlim[1], 7) if float(v).is_integer()]
    for k, box in enumerate(boxes):
        colour, p = outcome_colour(k), photons.astype(int)
        model, se = model_theta[k, p], model_stderr[k, p]
        recon, recon_se = reconstruction_theta[k, p], np.nan_to_num(reconstruction_stderr[k, p])
        ylim = _limits(model - 1.96 * se, model + 1.96 * se, recon - recon_se, recon + recon_se, include=[0.0])
        ylim = (max(ylim[0], -0.05), min(ylim[1], 1.05))
        panel = Panel(box, xlim, ylim)
        left = k % 3 == 0
        panel.axes([(v, t if lowest[k] else None) for v, t in xticks], linear_ticks(*ylim, 4),
                   "photon number n" if lowest[k] else None, "P(k | n)" if left else None, f"outcome {k}")
        panel.band(photons, model - 1.96 * se, model + 1.96 * se, colour)
        panel.line(photons, model, colour, 1.5)
        value, error = reconstruction_theta[k, p], np.nan_to_num(reconstruction_stderr[k, p])
        panel.error_bars(photons, value - error, value + error, "#111")
        panel.points(photons, value, "#111", 0, hollow=True)
        parts.append(panel.svg())
    return svg_document(FIGURE_WIDTH, height + 30, "Parametric and model-free POVM elements", parts)


def wigner_figure(re_alpha, model_values, points: list[dict], smoothed: list[dict], model_points=None) -> str:
    """Wigner functions of the POVM elements along the real axis, one panel per outcome.

    Args:
        re_alpha: (n_grid,) Re(alpha) of the model curve (Im(alpha) = 0).
        model_values: (n_outcomes, n_grid) model Wigner values (units 1/area in alpha).
        points: per outcome, dict ``re_alpha``, ``value``, ``stderr`` arrays (pointwise values).
        smoothed: per outcome, dict ``re_alpha``, ``value`` arrays (may be empty).
        model_points: optional, per outcome, dict ``re_alpha``, ``value``: the pointwise
            estimator applied to the model's exact probabilities (what the cross-check
            compares the pointwise values with), drawn as filled diamonds.
    The panels share the horizontal axis; each has its own vertical range.
    """
    re_alpha = np.asarray(re_alpha, dtype=float)
    n_outcomes = model_values.shape[0]
    entries = [{"text": "model", "colour": "#444", "dash": ""}]
    if any(len(s["re_alpha"]) for s in smoothed):
        entries.append({"text": "smoothed (saturation prior)", "colour": "#333", "dash": "6 3"})
    if any(len(p["re_alpha"]) for p in points):
        entries.append({"text": "pointwise (displaced-thermal probes)", "colour": "#111", "shape": 0, "hollow": True})
    if model_points:
        entries.append({"text": "model through the pointwise estimator (filled triangles)", "colour": "#444", "shape": 2})
    parts, legend_height = legend([(None, entries)], 70, 8, FIGURE_WIDTH - 80)
    boxes, lowest, height = panel_boxes(n_outcomes, 50 + legend_height, 70, 64)
    xlim = (float(re_alpha.min()), float(re_alpha.max()))
    xticks = linear_ticks(*xlim, 7)
    for k, box in enumerate(boxes):
        curve = smoothed[k]["value"] if k < len(smoothed) else []
        dot = points[k] if k < len(points) else {"re_alpha": [], "value": [], "stderr": []}
        value, error = np.asarray(dot["value"], dtype=float), np.asarray(dot["stderr"], dtype=float)
        drawn_model = model_points[k]["value"] if model_points and k < len(model_points) else []
        ylim = _limits(model_values[k], curve, value - error, value + error, drawn_model, include=[0.0])
        panel = Panel(box, xlim, ylim)
        panel.axes([(v, t if lowest[k] else None) for v, t in xticks], linear_ticks(*ylim, 5),
                   "Re(alpha)  [Im(alpha) = 0], linear" if lowest[k] else None, "W(alpha), linear" if k % 3 == 0 else None,
                   f"outcome {k}")
        colour = outcome_colour(k)
        panel.hline(0, "#888", 0.8)
        panel.line(re_alpha, model_values[k], colour, 1.5)
        if k < len(smoothed) and len(smoothed[k]["re_alpha"]):
            order = np.argsort(smoothed[k]["re_alpha"])
            panel.line(np.asarray(smoothed[k]["re_alpha"])[order], np.asarray(smoothed[k]["value"])[order], "#333", 1.2, "6 3")
        if len(dot["re_alpha"]):
            x = np.asarray(dot["re_alpha"], dtype=float)
            panel.error_bars(x, value - error, value + error, "#111")
            panel.points(x, value, "#111", 0, hollow=True)
        if model_points and k < len(model_points) and len(model_points[k]["re_alpha"]):
            panel.points(np.asarray(model_points[k]["re_alpha"], dtype=float),
                         np.asarray(model_points[k]["value"], dtype=float), colour, 2)
        parts.append(panel.svg())
    return svg_document(FIGURE_WIDTH, height + 30, "Wigner functions of the POVM elements along the real axis", parts)
