"""Plain-text and HTML formatting shared by the result objects (``summary()`` and
``_repr_html_()``): numbers with uncertainties in the usual ``0.6194 ± 0.0186`` form and
small tables. No physics and no statistics here."""
from __future__ import annotations

import html
import math

__all__ = ["format_number", "format_uncertain", "format_quantity", "format_interval", "format_p_value", "text_table", "html_table",
           "html_block", "FIGURE_UNITS"]


def format_number(value, digits: int = 4) -> str:
    """``value`` with ``digits`` significant digits; "n/a" for None or NaN."""
    if value is None or (isinstance(value, float) and math.isnan(value)):
        return "n/a"
    if isinstance(value, (bool, int)) or not isinstance(value, float):
        return str(value)
    return f"{value:.{digits}g}"


def format_uncertain(value, stderr, digits: int = 2) -> str:
    """``value ± stderr`` with the uncertainty to ``digits`` significant digits and the value
    rounded to the same decimal place (``0.61940 ± 0.00053``)."""
    if value is None or stderr is None or not math.isfinite(value) or not math.isfinite(stderr) or stderr <= 0:
        return format_number(value, 6)
    place = digits - 1 - math.floor(math.log10(abs(stderr)))
    if place > 0:
        return f"{value:.{place}f} ± {stderr:.{place}f}"
    return f"{round(value, place):.0f} ± {round(stderr, place):.0f}"


_PREFIXES = ((1e9, "G"), (1e6, "M"), (1e3, "k"), (1.0, ""), (1e-3, "m"), (1e-6, "µ"), (1e-9, "n"))
# display unit of each datasheet figure: "%" for probabilities, "Hz" (with SI prefixes) for rates
FIGURE_UNITS = {
    "efficiency": "%", "vacuum_click_probability": "%", "crosstalk_probability": "%",
    "dark_click_probability_per_pixel": "%", "dark_count_rate_hz": "Hz", "dark_count_rate_per_pixel_hz": "Hz",
}


def _scale_and_unit(value, stderr, unit: str) -> tuple[float, str]:
    if unit == "%":
        return 100.0, "%"
    if unit:
        magnitude = abs(value) if value else abs(stderr or 0.0)
        scale, prefix = next(((1 / f, p) for f, p in _PREFIXES if magnitude >= f), (1e9, "n"))
        return scale, prefix + unit
    return 1.0, ""


def format_interval(lo, hi, stderr, unit: str, reference=None) -> str:
    """``[lo, hi] unit`` with the decimals ``format_quantity`` gives a value of uncertainty
    ``stderr`` (and the unit prefix chosen for ``reference``, default the midpoint)."""
    if lo is None or hi is None or not (math.isfinite(lo) and math.isfinite(hi)):
        return "n/a"
    reference = (lo + hi) / 2 if reference is None else reference
    scale, shown = _scale_and_unit(reference, stderr, unit)
    if stderr and math.isfinite(stderr) and stderr > 0:
        place = max(1 - math.floor(math.log10(abs(stderr * scale))), 0)
        return f"[{lo * scale:.{place}f}, {hi * scale:.{place}f}] {shown}".rstrip()
    return f"[{lo * scale:.4g}, {hi * scale:.4g}] {shown}".rstrip()


def format_quantity(value, stderr, unit: str) -> str:
    """``value ± stderr`` in a display unit: ``"%"`` shows a fraction in per cent
    (``61.94 ± 0.05 %``), ``"Hz"`` (or any SI unit) takes the prefix that suits the value
    (``164.2 ± 3.5 kHz``); an empty unit leaves the number as it is."""
    if value is None or not math.isfinite(value):
        return "n/a"
    scale, shown = _scale_and_unit(value, stderr, unit)
    if stderr is None:
        return f"{value * scale:.4g} {shown}".rstrip()
    text = format_uncertain(value * scale, None if stderr is None else stderr * scale)
    return f"{text} {shown}".rstrip()


def format_p_value(p) -> str:
    """One format for p-values everywhere: three significant digits, ``< 1e-300`` at the floor."""
    if p is None or (isinstance(p, float) and math.isnan(p)):
        return "n/a"
    if p < 1e-300:
        return "< 1e-300"
    return f"{p:.3g}"


def text_table(header: list[str], rows: list[list[str]]) -> str:
    """Left-aligned first column, right-aligned others, two spaces apart."""
    cells = [list(map(str, header))] + [list(map(str, row)) for row in rows]
    widths = [max(len(row[i]) for row in cells) for i in range(len(header))]
    lines = []
    for row in cells:
        lines.append("  ".join(c.ljust(w) if i == 0 else c.rjust(w) for i, (c, w) in enumerate(zip(row, widths))).rstrip())
    lines.insert(1, "  ".join("-" * w for w in widths))
    return "\n".join(lines)


def html_table(header: list[str], rows: list[list[str]]) -> str:
    head = "".join(f"<th>{html.escape(str(h))}</th>" for h in header)
    body = "".join("<tr>" + "".join(f"<td>{html.escape(str(c))}</td>" for c in row) + "</tr>" for row in rows)
    return f"<table><thead><tr>{head}</tr></thead><tbody>{body}</tbody></table>"


def html_block(title: str, lines: list[str], tables: list[str] = ()) -> str:
    """A titled block for notebooks: escaped lines, then the given (already HTML) tables."""
    text = "".join(f"<div>{html.escape(line)}</div>" for line in lines)
    return f"<div class='povmfit'><strong>{html.escape(title)}</strong>{text}{''.join(tables)}</div>"
