"""The datasheet's figures as tables to paste: CSV, Markdown and LaTeX.

Numbers in SI base units (fractions, hertz, seconds) in the CSV; the Markdown and LaTeX
tables show the display units of the report (per cent, kHz) with the uncertainty in the
usual ``value ± stderr`` form.
"""
from __future__ import annotations

import csv
import io

from povmfit.fitting.display import FIGURE_UNITS, format_interval, format_quantity

__all__ = ["figure_tables"]

_COLUMNS = ("figure", "value", "stderr", "ci95_lo", "ci95_hi", "stat_stderr", "calibration_stderr", "unit", "meaning")


def _csv(figures: dict) -> str:
    out = io.StringIO()
    writer = csv.writer(out, lineterminator="\n")
    writer.writerow(_COLUMNS)
    for name, f in figures.items():
        unit = "Hz" if FIGURE_UNITS.get(name) == "Hz" else "1"
        writer.writerow([name, repr(f["value"]), repr(f["stderr"]), repr(f["ci95"][0]), repr(f["ci95"][1]),
                         repr(f["stat_stderr"]) if "stat_stderr" in f else "",
                         repr(f["calibration_stderr"]) if "calibration_stderr" in f else "", unit, f.get("meaning", "")])
    return out.getvalue()


def _display_rows(figures: dict) -> list[tuple[str, str, str]]:
    rows = []
    for name, f in figures.items():
        unit = FIGURE_UNITS.get(name, "")
        rows.append((name, format_quantity(f["value"], f["stderr"], unit),
                     format_interval(*f["ci95"], f["stderr"], unit, reference=f["value"])))
    return rows


def _markdown(figures: dict) -> str:
    lines = ["| figure | value ± standard error | 95 % interval |", "|---|---|---|"]
    lines += [f"| `{name}` | {value} | {interval} |" for name, value, interval in _display_rows(figures)]
    return "\n".join(lines) + "\n"


def _latex_text(text: str) -> str:
    for plain, escaped in (("\\", r"\textbackslash{}"), ("_", r"\_"), ("%", r"\%"), ("&", r"\&"), ("#", r"\#"),
                           ("±", r"$\pm$"), ("µ", r"$\mu$")):
        text = text.replace(plain, escaped)
    return text


def _latex(figures: dict) -> str:
    lines = [r"\begin{tabular}{lll}", r"\hline", r"figure & value $\pm$ standard error & 95\,\% interval \\", r"\hline"]
    lines += [f"{_latex_text(name)} & {_latex_text(value)} & {_latex_text(interval)} \\\\"
              for name, value, interval in _display_rows(figures)]
    lines += [r"\hline", r"\end{tabular}"]
    return "\n".join(lines) + "\n"


def figure_tables(sheet: dict) -> dict[str, str]:
    """{file name: text} for figures.csv, figures.md and figures.tex."""
    figures = sheet["figures"]
    return {"figures.csv": _csv(figures), "figures.md": _markdown(figures), "figures.tex": _latex(figures)}
