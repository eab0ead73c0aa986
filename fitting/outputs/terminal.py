"""What the terminal shows: the datasheet in words and SI units, and a progress bar."""
from __future__ import annotations

from povmfit.fitting.display import FIGURE_UNITS, format_interval, format_p_value, format_quantity, text_table

__all__ = ["format_summary", "TerminalProgress", "CANDIDATES_SHOWN"]

CANDIDATES_SHOWN = 6


def _interval(figure: dict, unit: str) -> str:
    return format_interval(*figure["ci95"], figure["stderr"], unit, reference=figure["value"])


def _assumptions(sheet: dict) -> list[str]:
    calibration = sheet.get("calibration") or {}
    lines = []
    if calibration.get("included"):
        lines.append(f"probe calibration  {100 * calibration['relative_uncertainty']:.3g} % relative (1 sigma), "
                     "included in the efficiency's uncertainty (statistical and calibration parts below)")
    else:
        lines.append("probe calibration  probes taken as exact: the efficiency excludes the calibration uncertainty")
    gate = next((f.get("gate_duration_s") for f in sheet["figures"].values() if f.get("gate_duration_s")), None)
    lines.append(f"gate               {format_quantity(gate, None, 's')} (dark count rates per gate duration)" if gate
                 else "gate               not given: no dark count rates")
    conditions = sheet.get("conditions") or {}
    if conditions:
        lines.append("conditions         " + ", ".join(f"{k} = {v}" for k, v in conditions.items()))
    return lines


def _part(stderr, unit: str) -> str:
    return format_quantity(float(f"{stderr:.2g}"), None, unit)


def _figure_rows(sheet: dict) -> list[list[str]]:
    rows = []
    for name, figure in sheet["figures"].items():
        unit = FIGURE_UNITS.get(name, "")
        parts = ""
        if figure.get("calibration_stderr"):
            parts = (f"stat {_part(figure['stat_stderr'], unit)}, calib {_part(figure['calibration_stderr'], unit)}")
        rows.append([name, format_quantity(figure["value"], figure["stderr"], unit), _interval(figure, unit), parts])
    return rows


def _cross_check_lines(cross: dict) -> list[str]:
    if not cross.get("verdict"):
        return []
    lines = [f"cross-check  {cross['verdict']}"]
    povm = cross.get("povm") or {}
    if povm.get("chi_square") is not None:
        largest = povm.get("largest") or {}
        lines.append(f"  POVM vs model-free reconstruction: chi2 {povm['chi_square']:.1f} on {povm['dof']} entries, "
                     f"p = {format_p_value(povm.get('p_value'))}; largest |z| {povm.get('max_abs_z', 0):.2f} "
                     f"(outcome {largest.get('outcome')}, {largest.get('photons')} photons)")
    wigner = cross.get("wigner") or {}
    if wigner.get("chi_square") is not None:
        lines.append(f"  pointwise Wigner values: chi2 {wigner['chi_square']:.1f} on {wigner['dof']} values, "
                     f"p = {format_p_value(wigner.get('p_value'))}; largest |z| {wigner.get('max_abs_z', 0):.2f}")
    return lines


def format_summary(sheet: dict, files: dict) -> str:
    """The datasheet as the terminal shows it after ``fit`` or ``demo``."""
    lines = [f"model        {sheet['model']['spec']}", f"verdict      {sheet.get('verdict') or 'n/a'}", ""]
    lines += _assumptions(sheet) + [""]
    lines.append(text_table(["figure", "value ± stderr", "95 % interval", "uncertainty parts"], _figure_rows(sheet)))
    gof = sheet["goodness_of_fit"]
    lines += ["", f"fit quality  deviance {gof['deviance']:.1f} on {gof['dof']} dof, goodness-of-fit p = "
              f"{format_p_value(gof['p_value'])}" + ("" if gof["converged"] else "  (the optimiser did NOT converge)")]
    comparison = sheet.get("model_comparison") or []
    if len(comparison) > 1:
        shown = comparison[:CANDIDATES_SHOWN]
        rows = [[r["model"], r["parameters"], f"{r['delta_bic']:.1f}", f"{r['delta_aic']:.1f}", format_p_value(r["p_value"])]
                for r in shown]
        lines += ["", text_table(["candidate", "k", "dBIC", "dAIC", "p"], rows)]
        if len(comparison) > len(shown):
            lines.append(f"({len(shown)} of {len(comparison)} candidates shown, best first; all are in datasheet.json)")
    cross = _cross_check_lines(sheet.get("cross_check") or {})
    if cross:
        lines += [""] + cross
    lines.append("")
    plots = [path for name, path in files.items() if name.startswith("plot_")]
    for name, path in files.items():
        if not name.startswith("plot_"):
            lines.append(f"wrote {name:<12} {path}")
    if plots:
        lines.append(f"wrote {'plots':<12} {len(plots)} files in {plots[0].parent}")
    return "\n".join(lines)


class TerminalProgress:
    """A ``progress(task, done, total)`` callback drawing one bar per task on a stream
    (stderr by default); silent when the stream is not a terminal."""

    def __init__(self, stream=None):
        import sys

        self.stream = stream if stream is not None else sys.stderr
        self.active = bool(getattr(self.stream, "isatty", lambda: False)())
        self._task = None

    def __call__(self, task: str, done: int, total: int) -> None:
        if not self.active or total <= 0:
            return
        if task != self._task and self._task is not None:
            self.stream.write("\n")
        self._task = task
        filled = int(30 * min(done, total) / total)
        self.stream.write(f"\r{task:<28} [{'#' * filled}{'.' * (30 - filled)}] {done}/{total}")
        if done >= total:
            self.stream.write("\n")
            self._task = None
        self.stream.flush()
