"""Compact human-readable summary of a datasheet for the terminal."""
from __future__ import annotations

__all__ = ["format_summary", "TerminalProgress"]


def _num(value, digits=4) -> str:
    if value is None:
        return "-"
    return f"{value:.{digits}g}"


def format_summary(sheet: dict, files: dict) -> str:
    model = sheet["model"]
    lines = [f"model      {model['spec']}", f"verdict    {sheet.get('verdict') or '-'}", ""]
    lines.append(f"{'figure':<28}{'value':>12}{'stderr':>12}{'stat':>12}{'calib':>12}   95% interval")
    for name, fig in sheet["figures"].items():
        lines.append(
            f"{name:<28}{_num(fig['value']):>12}{_num(fig['stderr']):>12}{_num(fig.get('stat_stderr')):>12}"
            f"{_num(fig.get('calibration_stderr')):>12}   [{_num(fig['ci95'][0])}, {_num(fig['ci95'][1])}]"
        )
    note = sheet["calibration"].get("note")
    if note:
        lines.append(f"note: {note}")
    gof = sheet["goodness_of_fit"]
    lines.append("")
    lines.append(f"fit quality  deviance {gof['deviance']:.1f} on {gof['dof']} dof, p = {_num(gof['p_value'], 3)}"
                 + ("" if gof["converged"] else "  (optimiser did NOT converge)"))
    comparison = sheet.get("model_comparison") or []
    if len(comparison) > 1:
        lines.append("")
        lines.append(f"{'candidate':<44}{'k':>3}{'dBIC':>10}{'dAIC':>10}{'p':>10}")
        for row in comparison[:6]:
            lines.append(f"{row['model']:<44}{row['parameters']:>3}{row['delta_bic']:>10.1f}{row['delta_aic']:>10.1f}{_num(row['p_value'], 3):>10}")
    cross = sheet.get("cross_check") or {}
    if cross.get("verdict"):
        lines.append("")
        lines.append(f"cross-check  {cross['verdict']}")
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
