"""From the data instruments give to a scan: the public entry points of ``povmfit tally``.

``tally_pulse_heights(probes)`` reads every probe's pulse heights (or histogram), fits one
peak model to all spectra by maximum likelihood (peaks n = 0, 1, ... with means
``offset + gain n [+ curvature n^2]`` and widths ``sqrt(width_0^2 + n width_1^2)``, weighted by
each probe's registered-photon distribution through a free efficiency), sets the thresholds
between neighbouring peaks where misassignment is smallest and counts each probe's triggers
per outcome. ``tally_click_log(probes)`` counts, per probe, the triggers of every click
pattern. Both return frozen results with ``.scan`` (a :class:`~povmfit.Scan`), ``summary()``,
``_repr_html_()``, ``to_dataframe()``, ``to_dict()`` and ``write(out)``.

The PROBES file format is described in :mod:`povmfit.fitting.tally.probes`; the files are
read in bounded memory (:mod:`povmfit.fitting.tally.streams`). Progress goes to the optional
callback ``progress(task, done, total)``. Bad input raises a typed error with one line
naming the file and line; nothing is written by the entry points themselves.
"""
from __future__ import annotations

import math
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

import povmfit
from povmfit.fitting.data.errors import ArgumentError, InputFileError, OutputError
from povmfit.fitting.data.files import atomic_write_text, file_sha256, write_json
from povmfit.fitting.data.scan import Scan, scan_from_arrays, write_scan
from povmfit.fitting.display import format_number, format_p_value, format_uncertain, html_block, html_table, text_table
from povmfit.fitting.inference.result import jsonable
from povmfit.fitting.tally import spectra as sp
from povmfit.fitting.tally.click_log import LOG_FORMATS, MAX_CHANNELS, tally_log
from povmfit.fitting.tally.probes import read_probes
from povmfit.fitting.tally.pulse_heights import count_pulse_heights
from povmfit.fitting.tally.readout import SCHEMA as READOUT_SCHEMA
from povmfit.fitting.tally.readout import parameter_entry

__all__ = ["tally_pulse_heights", "tally_click_log", "PulseHeightTally", "ClickLogTally", "check_scan_path"]

_BOUNDS = {"gain": (0.0, math.inf), "width_0": (0.0, math.inf), "width_1": (0.0, math.inf), "efficiency": (0.0, 1.0)}


def _frozen(array, dtype=None) -> np.ndarray:
    array = np.array(array, dtype=dtype)
    array.setflags(write=False)
    return array


def check_scan_path(out, argument: str = "out") -> Path:
    """Refuse a scan path that cannot be written (wrong suffix, a folder) before any work."""
    path = Path(out)
    if path.suffix.lower() not in (".csv", ".parquet"):
        raise ArgumentError(f"{argument}: the scan file must end in .csv or .parquet, got {str(out)!r}")
    if path.is_dir():
        raise OutputError(f"{argument}: {out} is a folder; give the scan file's name")
    return path


def _whole(value, argument: str, low: int, high: int):
    if value is None:
        return None
    if isinstance(value, bool) or not isinstance(value, (int, np.integer)) or not low <= value <= high:
        raise ArgumentError(f"{argument}: expected a whole number from {low} to {high}, got {value!r}")
    return int(value)


# ----- pulse heights ---------------------------------------------------------------------------
@dataclass(frozen=True, eq=False)
class PulseHeightTally:
    """The result of :func:`tally_pulse_heights`.

    Attributes:
        probes_file: the PROBES file as given; probes_sha256: its SHA-256.
        scan: the scan (outcomes 0..max_outcome, the top one meaning "max_outcome or more").
        parameters: {name: {value, stderr, ci95}} for ``offset``, ``gain``, ``curvature``
            (value 0 and stderr None unless fitted), ``width_0``, ``width_1`` (pulse-height
            units) and ``efficiency`` (from the spectra alone; probes taken as exact).
        max_outcome: K.
        thresholds: (K,) thresholds t_1..t_K in pulse-height units (outcome k: [t_k, t_{k+1})).
        misassignment: (K+1, n_columns) ``M[k, m] = P(outcome k | m photons registered)``.
        separation: (K,) equal-prior misassignment between peaks n and n+1.
        goodness_of_fit: {deviance, dof, p_value, converged, message}: pooled bins (each
            expecting >= 5 triggers) of all probes against the fitted spectra.
        probes: per probe {probe, file, kind, triggers, thresholds_applied}.
        spectra: the binned spectra as fitted (for plots); n_peaks: peaks in the model.
    """

    probes_file: str
    probes_sha256: str
    scan: Scan
    parameters: dict
    max_outcome: int
    thresholds: np.ndarray
    misassignment: np.ndarray
    separation: np.ndarray
    goodness_of_fit: dict
    probes: tuple
    spectra: tuple = field(repr=False)
    n_peaks: int = 0

    def __post_init__(self):
        for name in ("thresholds", "misassignment", "separation"):
            object.__setattr__(self, name, _frozen(getattr(self, name), float))

    @property
    def values(self) -> dict:
        return {name: entry["value"] for name, entry in self.parameters.items()}

    def to_dict(self) -> dict:
        """The ``readout.json`` record (schema ``povmfit.readout/1``) plus the scan's counts."""
        return jsonable({
            "schema": READOUT_SCHEMA,
            "max_outcome": self.max_outcome,
            "thresholds": self.thresholds,
            "parameters": self.parameters,
            "misassignment": {"rows": f"outcome k = 0..{self.max_outcome} ({self.max_outcome} means "
                                      f"{self.max_outcome} or more)",
                              "columns": f"photons registered m = 0..{self.misassignment.shape[1] - 1}; "
                                         "later m report the top outcome",
                              "matrix": self.misassignment},
            "separation": self.separation,
            "goodness_of_fit": self.goodness_of_fit,
            "probes": [dict(p, counts=self.scan.counts[i]) for i, p in enumerate(self.probes)],
            "provenance": {"probes_file": self.probes_file, "probes_sha256": self.probes_sha256,
                           "software": f"povmfit {povmfit.__version__}"},
        })

    def to_dataframe(self):
        """One row per probe: probe, coherent_photons, thermal_photons, shots, count_0..count_K,
        file, triggers."""
        frame = self.scan.to_frame()
        frame["file"] = [p["file"] for p in self.probes]
        return frame

    def summary(self) -> str:
        lines = [f"pulse-height tally of {self.probes_file}: {self.scan.n_probes} probes, "
                 f"{int(self.scan.shots.sum()):,} triggers, outcomes 0..{self.max_outcome} "
                 f"({self.max_outcome} means {self.max_outcome} or more)"]
        rows = []
        for name, entry in self.parameters.items():
            if entry["stderr"] is None and name == "curvature":
                continue
            rows.append([name, format_uncertain(entry["value"], entry["stderr"]),
                         f"[{format_number(entry['ci95'][0], 5)}, {format_number(entry['ci95'][1], 5)}]"])
        lines += ["", text_table(["parameter", "value ± stderr", "95 % interval"], rows)]
        lines.append("(efficiency from the spectra alone, probes taken as exact)")
        lines += ["", "thresholds   " + ", ".join(f"{t:.5g}" for t in self.thresholds),
                  "separation   " + ", ".join(f"{n}|{n + 1} {e:.2g}" for n, e in enumerate(self.separation))
                  + "  (equal-prior misassignment of neighbouring peaks)"]
        gof = self.goodness_of_fit
        lines.append(f"fit quality  deviance {gof['deviance']:.1f} on {gof['dof']} dof (pooled bins), p = "
                     f"{format_p_value(gof['p_value'])}" + ("" if gof["converged"] else
                                                           "  (the optimiser did NOT converge)"))
        shown = min(self.max_outcome, 6)
        header = ["probe", "triggers"] + [f"count_{k}" for k in range(shown + 1)] + (["..."] if shown < self.max_outcome else [])
        table = [[p["probe"], f"{p['triggers']:,}"] + [str(c) for c in self.scan.counts[i, : shown + 1]]
                 + (["..."] if shown < self.max_outcome else []) for i, p in enumerate(self.probes)]
        lines += ["", text_table(header, table)]
        return "\n".join(lines)

    def _repr_html_(self) -> str:
        rows = [[name, format_uncertain(e["value"], e["stderr"])] for name, e in self.parameters.items()]
        return html_block("Pulse-height tally", self.summary().splitlines()[:1], [html_table(["parameter", "value"], rows)])

    def write(self, out, readout=None, report=None) -> dict:
        """Write the scan (``out``, .csv or .parquet), ``readout.json`` (default beside the scan)
        and, when ``report`` is given (a path, or True for ``SCAN_STEM.tally.html`` beside
        the scan), the HTML report. Each file atomically. Returns {kind: path}."""
        out = check_scan_path(out)
        readout = Path(readout) if readout is not None else out.parent / "readout.json"
        files = {"scan": out, "readout": readout}
        if report:
            files["report"] = Path(report) if report is not True else out.with_name(out.stem + ".tally.html")
        page = None
        if report:
            from povmfit.fitting.outputs.tally_report import pulse_height_report

            page = pulse_height_report(self)  # before anything is written
        write_scan(self.scan, out)
        write_json(readout, self.to_dict())
        if page is not None:
            atomic_write_text(files["report"], page)
        return files


def tally_pulse_heights(probes, *, max_photons=None, quadratic: bool = False, progress=None) -> PulseHeightTally:
    """Turn per-trigger pulse heights (or histograms) into a scan and a fitted readout.

    Args:
        probes: path of the PROBES file (CSV: ``probe``, ``coherent_photons``,
            ``thermal_photons`` and ``heights`` or ``histogram``; see
            :mod:`povmfit.fitting.tally.probes`).
        max_photons: K, the largest outcome ("K or more"); default: where every probe's
            registered-photon tail beyond K is below 1e-3, at most the last separable peak.
        quadratic: fit a small quadratic term ``curvature n^2`` in the peak positions.
        progress: optional callback ``progress(task, done, total)``.
    """
    max_photons = _whole(max_photons, "max_photons", 1, 1000)
    if not isinstance(quadratic, (bool, np.bool_)):
        raise ArgumentError(f"quadratic: expected True or False, got {quadratic!r}")
    entries = read_probes(probes, "pulse_heights")
    result = count_pulse_heights(entries, str(probes), max_photons, bool(quadratic), progress)
    fit = result.fit
    parameters = {}
    for name in sp.PARAMETERS:
        value = fit.values[name]
        if name not in fit.free:
            parameters[name] = {"value": value, "stderr": None, "ci95": [value, value]}
            continue
        lower, upper = _BOUNDS.get(name, (-math.inf, math.inf))
        parameters[name] = parameter_entry(value, fit.stderr(name), lower, upper)
    scan = scan_from_arrays([e.coherent_photons for e in entries], [e.thermal_photons for e in entries],
                            result.counts, labels=[e.label for e in entries], source=str(probes))
    rows = tuple({"probe": e.label, "file": e.name, "kind": e.kind, "triggers": int(result.triggers[i]),
                  "thresholds_applied": [float(t) for t in result.applied[i]]} for i, e in enumerate(entries))
    gof = {"deviance": fit.deviance, "dof": fit.dof, "p_value": fit.p_value, "converged": fit.converged,
           "message": fit.message}
    return PulseHeightTally(str(probes), file_sha256(probes), scan, parameters, result.max_outcome, result.thresholds,
                            result.matrix, result.separation, gof, rows, result.spectra, fit.n_peaks)


# ----- click logs ------------------------------------------------------------------------------
@dataclass(frozen=True, eq=False)
class ClickLogTally:
    """The result of :func:`tally_click_log`.

    Attributes:
        probes_file, probes_sha256: the PROBES file and its SHA-256.
        scan: the click-number scan (outcomes 0..channels; its ``pattern_counts`` hold the
            patterns of every probe).
        channels: N.
        patterns: per probe {pattern: count} for every pattern seen (a 0/1 string, channel 0
            first).
        channel_clicks: (n_probes, N) triggers on which each channel fired.
        probes: per probe {probe, file, layout, triggers}.
    """

    probes_file: str
    probes_sha256: str
    scan: Scan
    channels: int
    patterns: tuple
    channel_clicks: np.ndarray
    probes: tuple

    def __post_init__(self):
        object.__setattr__(self, "channel_clicks", _frozen(self.channel_clicks, np.int64))

    @property
    def channel_probabilities(self) -> np.ndarray:
        """(n_probes, N) click probability of every channel per trigger."""
        return self.channel_clicks / self.scan.shots[:, None]

    def to_dataframe(self):
        """One row per probe and channel: probe, channel, clicks, triggers, probability, stderr
        (binomial, sqrt(p(1-p)/triggers))."""
        import pandas as pd

        rows = []
        for p, entry in enumerate(self.probes):
            n = int(self.scan.shots[p])
            for c in range(self.channels):
                clicks = int(self.channel_clicks[p, c])
                q = clicks / n
                rows.append({"probe": entry["probe"], "coherent_photons": float(self.scan.coherent_photons[p]),
                             "thermal_photons": float(self.scan.thermal_photons[p]), "channel": c,
                             "clicks": clicks, "triggers": n, "probability": q,
                             "stderr": math.sqrt(q * (1 - q) / n)})
        return pd.DataFrame(rows)

    def pattern_frame(self):
        """The pattern layout: probe, coherent_photons, thermal_photons, pattern, count
        (patterns not listed have zero counts); ``povmfit.load_scan`` reads it back."""
        import pandas as pd

        rows = [{"probe": entry["probe"], "coherent_photons": float(self.scan.coherent_photons[p]),
                 "thermal_photons": float(self.scan.thermal_photons[p]), "pattern": pattern, "count": count}
                for p, entry in enumerate(self.probes) for pattern, count in self.patterns[p].items()]
        return pd.DataFrame(rows, columns=["probe", "coherent_photons", "thermal_photons", "pattern", "count"])

    def to_dict(self) -> dict:
        return jsonable({"probes_file": self.probes_file, "probes_sha256": self.probes_sha256,
                         "channels": self.channels, "probes": self.probes, "counts": self.scan.counts,
                         "channel_clicks": self.channel_clicks, "patterns": [dict(p) for p in self.patterns]})

    def summary(self) -> str:
        lines = [f"click-log tally of {self.probes_file}: {self.scan.n_probes} probes, "
                 f"{int(self.scan.shots.sum()):,} triggers, {self.channels} channels"]
        shown = min(self.channels, 8)
        header = ["probe", "triggers", "patterns"] + [f"ch{c}" for c in range(shown)] + (["..."] if shown < self.channels else [])
        rows = []
        for p, entry in enumerate(self.probes):
            q = self.channel_probabilities[p]
            rows.append([entry["probe"], f"{entry['triggers']:,}", str(len(self.patterns[p]))]
                        + [f"{v:.4f}" for v in q[:shown]] + (["..."] if shown < self.channels else []))
        lines += ["", "click probability per channel:", text_table(header, rows)]
        return "\n".join(lines)

    def _repr_html_(self) -> str:
        return html_block("Click-log tally", self.summary().splitlines()[:1]) + self.scan.to_frame().to_html(index=False)

    def write(self, out) -> dict:
        """Write the scan (``out``), ``STEM.patterns.csv`` and ``STEM.channels.csv`` beside it,
        each atomically. Returns {kind: path}."""
        out = check_scan_path(out)
        files = {"scan": out, "patterns": out.with_name(out.stem + ".patterns.csv"),
                 "channels": out.with_name(out.stem + ".channels.csv")}
        write_scan(self.scan, out)
        atomic_write_text(files["patterns"], self.pattern_frame().to_csv(index=False, lineterminator="\n"))
        atomic_write_text(files["channels"], self.to_dataframe().to_csv(index=False, lineterminator="\n"))
        return files


def tally_click_log(probes, *, channels=None, log_format: str = "auto", progress=None) -> ClickLogTally:
    """Turn per-trigger click logs into a click-number scan, click patterns and per-channel
    click probabilities.

    Args:
        probes: path of the PROBES file (CSV: ``probe``, ``coherent_photons``,
            ``thermal_photons``, ``log``; see :mod:`povmfit.fitting.tally.probes`).
        channels: N; bitmasks with a bit at or above N (or patterns of another width) are
            refused. Default: the pattern width, or the highest channel that ever fired.
        log_format: "auto", "bitmask" or "pattern" for text logs (see
            :mod:`povmfit.fitting.tally.click_log`).
        progress: optional callback ``progress(task, done, total)``.
    """
    channels = _whole(channels, "channels", 1, MAX_CHANNELS)
    if log_format not in LOG_FORMATS:
        raise ArgumentError(f"log_format: expected one of {', '.join(LOG_FORMATS)}, got {log_format!r}")
    entries = read_probes(probes, "click_log")
    tallies = [tally_log(e.path, e.name, channels, log_format, progress, f"reading {e.label}") for e in entries]
    pattern_files = [(e, t) for e, t in zip(entries, tallies) if t.layout == "pattern"]
    for entry, tally in pattern_files[1:]:
        if tally.width != pattern_files[0][1].width:
            raise InputFileError(f"{entry.name}: patterns of {tally.width} channels, but {pattern_files[0][0].name} "
                                 f"has {pattern_files[0][1].width}")
    width = channels or (pattern_files[0][1].width if pattern_files else max(max(t.width for t in tallies), 1))
    for entry, tally in zip(entries, tallies):
        if tally.width > width:
            raise InputFileError(f"{entry.name}: a bitmask has a bit above channel {width - 1} (the patterns' width; "
                                 "give --channels)")
    counts = np.zeros((len(entries), width + 1), dtype=np.int64)
    clicks = np.zeros((len(entries), width), dtype=np.int64)
    patterns = []
    bits = np.arange(width, dtype=np.int64)
    for p, tally in enumerate(tallies):
        masks, numbers = tally.items()
        np.add.at(counts[p], np.bitwise_count(masks), numbers)
        fired = (masks[:, None] >> bits[None, :]) & 1
        clicks[p] = (fired * numbers[:, None]).sum(axis=0)
        patterns.append({"".join("1" if (m >> c) & 1 else "0" for c in range(width)): int(n)
                         for m, n in zip(masks.tolist(), numbers.tolist())})
    scan = scan_from_arrays([e.coherent_photons for e in entries], [e.thermal_photons for e in entries], counts,
                            labels=[e.label for e in entries], source=str(probes))
    scan = Scan(scan.coherent_photons, scan.thermal_photons, scan.shots, scan.counts, scan.phase_rad, scan.labels,
                scan.source, scan.sha256, tuple(patterns))
    rows = tuple({"probe": e.label, "file": e.name, "layout": t.layout, "triggers": t.triggers}
                 for e, t in zip(entries, tallies))
    return ClickLogTally(str(probes), file_sha256(probes), scan, width, tuple(patterns), clicks, rows)
