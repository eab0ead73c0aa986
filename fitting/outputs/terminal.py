"""What the terminal shows: the datasheet in words and SI units, and a progress bar."""
from __future__ import annotations

import sys
import threading
import time

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
    """A ``progress(task, done, total)`` callback for a terminal (stderr by default).

    One status line shows every unfinished task with its bar, count and the seconds since it
    began, redrawn every second so that a long first step (compiling a model's program, a
    worker process starting) is visibly alive; a finished task gets a line of its own. Tasks
    may arrive from several threads (the worker process's progress is relayed on one). Silent
    when the stream is not a terminal (logs and pipes get no control characters).
    """

    TICK_S = 1.0
    BAR = 20

    def __init__(self, stream=None):
        self.stream = stream if stream is not None else sys.stderr
        self.active = bool(getattr(self.stream, "isatty", lambda: False)())
        self._tasks: dict = {}  # task -> [done, total, start time]
        self._lock = threading.Lock()
        self._ticker = None

    def __call__(self, task: str, done: int, total: int) -> None:
        if not self.active or total <= 0:
            return
        with self._lock:
            entry = self._tasks.setdefault(task, [0, total, time.monotonic()])
            entry[0], entry[1] = min(done, total), total
            if done >= total:
                del self._tasks[task]
                self.stream.write("\r\033[K" + self._describe(task, entry) + "\n")
            self._draw()
            if self._tasks and self._ticker is None:
                self._start_ticker()

    def _describe(self, task: str, entry) -> str:
        done, total, start = entry
        filled = int(self.BAR * done / total)
        return f"{task} [{'#' * filled}{'.' * (self.BAR - filled)}] {done}/{total} {time.monotonic() - start:.0f} s"

    def _draw(self) -> None:
        self.stream.write("\r\033[K" + " | ".join(self._describe(t, e) for t, e in self._tasks.items()))
        self.stream.flush()

    def _start_ticker(self) -> None:
        def tick():
            while True:
                time.sleep(self.TICK_S)
                with self._lock:
                    if not self._tasks:
                        self._ticker = None
                        return
                    self._draw()

        self._ticker = threading.Thread(target=tick, daemon=True, name="povmfit-progress")
        self._ticker.start()
