"""Plan a measurement before taking it: which probes, and how many shots at each, reach target
standard errors on the datasheet figures with the fewest shots in total.

``plan(detector, targets)`` takes a detector as it is believed to be (a ``detector.json`` from
an earlier fit, a ``DetectorRecord``, a ``FitResult``, or a model spec with guessed values),
builds a grid of candidate probes inside the allowed photon-number ranges, and solves the
optimal design (``inference/planning.py``): minimum total shots subject to every target,
every model parameter kept identifiable (standard error at most ``max(0.1 |value|, 0.01)``),
then few distinct probes, whole shots rounded up and at least ``min_shots`` per probe. With a
calibration uncertainty the probe scale is a nuisance parameter with a Gaussian prior, so some
figures (the efficiency above all) have a floor that no number of shots removes; a target below it is refused with the
floor named. The result is a frozen :class:`MeasurementPlan`.

Conventions: photon numbers are mean photons per shot at the reference plane; standard errors
are absolute, in the figure's own unit; the design is linearised at the given parameters.
"""
from __future__ import annotations

import math
from dataclasses import dataclass, field, fields
from os import PathLike
from pathlib import Path

import numpy as np

from povmfit.models import DetectorModel, dark_parameter_names

from povmfit.fitting.data.detector_file import DetectorRecord, load_detector
from povmfit.fitting.data.errors import ArgumentError, NotIdentifiable
from povmfit.fitting.display import format_number
from povmfit.fitting.inference import planning
from povmfit.fitting.inference.result import FitResult, jsonable
from povmfit.fitting.data.arguments import as_calibration_uncertainty, as_model

__all__ = ["plan", "MeasurementPlan", "parse_targets", "parse_guess", "FIGURES", "MAX_PHOTONS"]

FIGURES = ("efficiency", "vacuum_click_probability", "dark_count_rate_hz", "dark_click_probability_per_pixel",
           "dark_count_rate_per_pixel_hz", "crosstalk_probability")
MAX_PHOTONS = 200.0  # largest allowed photon number of a probe range (cutoffs grow with it)
IDENTIFIABLE_RELATIVE = 0.1  # every parameter's stderr at most max(0.1 |value|, 0.01)
IDENTIFIABLE_ABSOLUTE = 0.01
CROSS_CHECK_THERMAL = 0.5  # second thermal level added for the pointwise Wigner cross-check
_ALIASES = {"dark": ("dark_probability", "dark_mean"), "crosstalk": ("crosstalk_probability",),
            "readout": ("readout_width",)}
_UNIFORM_LEVELS = (9, 4)  # the uniform grid compared with: coherent x thermal levels, evenly spaced


@dataclass(frozen=True)
class MeasurementPlan:
    """A planned measurement (the result of :func:`plan`).

    Attributes:
        model: the DetectorModel planned for.
        parameters: {name: value} the design is linearised at.
        calibration_uncertainty: relative 1-sigma probe calibration, or None (exact probes).
        targets: {figure: target standard error}.
        coherent_photons, thermal_photons: (n_probes,) probe photon numbers.
        shots: (n_probes,) whole shots per probe.
        labels: probe labels; purposes: "target" or "cross-check" per probe.
        total_shots: sum of ``shots``.
        optimal_total: the continuous optimum over the candidates before pruning to few probes
            and rounding (a lower bound for any design over the same candidates).
        figures: {figure: {value, stderr, stat_stderr, calibration_stderr, floor, target, met,
            calibration_dominated}} predicted for the planned shots (``floor``: the stderr with
            infinitely many shots in these proportions; ``calibration_dominated``: the
            calibration part carries more than half the variance).
        uniform: the comparison with equal shots on a uniform grid: ``coherent_photons``,
            ``thermal_photons``, ``total_shots`` needed for the same targets (None when that
            grid cannot reach them) and ``ratio`` (uniform / planned).
        candidates: {coherent_range, thermal_range, count} of the candidate grid.
        shots_per_second: acquisition rate, or None; bench_time_s: total_shots / rate.
        cross_check: {requested, possible, displacements, added_probes, added_shots}: whether
            the model-free pointwise Wigner cross-check is possible (two or more displacements
            with probes at two or more thermal levels) and what adding it cost.
        curve: {figure, total_shots, planned_stderr, uniform_stderr}: the first target's
            predicted stderr against the total shots for the planned and uniform proportions.
        notes: plain-language remarks (calibration floors, cross-check).
    """

    model: DetectorModel
    parameters: dict
    calibration_uncertainty: float | None
    targets: dict
    coherent_photons: np.ndarray
    thermal_photons: np.ndarray
    shots: np.ndarray
    labels: tuple
    purposes: tuple
    total_shots: int
    optimal_total: float
    figures: dict
    uniform: dict
    candidates: dict
    shots_per_second: float | None
    bench_time_s: float | None
    cross_check: dict
    curve: dict
    notes: tuple = field(default=())

    def __post_init__(self):
        for name in ("coherent_photons", "thermal_photons", "shots"):
            array = np.array(getattr(self, name), dtype=np.int64 if name == "shots" else float)
            array.setflags(write=False)
            object.__setattr__(self, name, array)

    @property
    def n_probes(self) -> int:
        return len(self.shots)

    def to_dict(self) -> dict:
        """Every field as plain JSON-able data (the model as its spec)."""
        out = {}
        for f in fields(self):
            value = getattr(self, f.name)
            out[f.name] = value.spec if isinstance(value, DetectorModel) else jsonable(value)
        return out

    def to_dataframe(self):
        """pandas DataFrame, one row per probe: probe, coherent_photons, thermal_photons,
        shots, purpose."""
        import pandas as pd

        return pd.DataFrame({"probe": list(self.labels), "coherent_photons": self.coherent_photons,
                             "thermal_photons": self.thermal_photons, "shots": self.shots,
                             "purpose": list(self.purposes)})

    def summary(self) -> str:
        """Plain text: the probes, the total, the predicted figures and the notes."""
        from povmfit.fitting.outputs.plan_report import format_plan

        return format_plan(self)

    def _repr_html_(self) -> str:
        from povmfit.fitting.outputs.plan_report import plan_html_block

        return plan_html_block(self)

    def write_csv(self, path) -> Path:
        """Write ``plan.csv`` (coherent_photons, thermal_photons, shots, probe) atomically."""
        from povmfit.fitting.outputs.plan_report import write_plan_csv

        return write_plan_csv(self, path)

    def write_report(self, path) -> Path:
        """Write the HTML report with the planned-vs-uniform plot (inline SVG) atomically."""
        from povmfit.fitting.outputs.plan_report import write_plan_report

        return write_plan_report(self, path)


# ----- arguments --------------------------------------------------------------------------------
def _named_items(given, separator: str, argument: str, form: str) -> list[tuple]:
    """(name, value text) pairs of a dict, a comma-separated string or a list of strings
    ``NAME<separator>VALUE``; a part without the separator is refused naming ``form``."""
    if isinstance(given, dict):
        return list(given.items())
    parts = str(given).split(",") if isinstance(given, str) else list(given)
    items = []
    for part in (str(p).strip() for p in parts):
        name, sep, value = part.partition(separator)
        if not sep:
            raise ArgumentError(f"{argument}: expected {form}, got {part!r}")
        items.append((name.strip(), value.strip()))
    return items


def parse_targets(targets) -> dict:
    """``{"efficiency": 0.002}``, ``"efficiency:0.002,vacuum_click_probability:1e-4"`` or a list
    of ``"FIGURE:STDERR"`` strings -> {figure: stderr}."""
    out = {}
    for name, value in _named_items(targets, ":", "targets", "FIGURE:STDERR"):
        try:
            value = float(value)
        except (TypeError, ValueError):
            raise ArgumentError(f"targets: {name}: expected a standard error, got {value!r}") from None
        if not math.isfinite(value) or value <= 0:
            raise ArgumentError(f"targets: {name}: the standard error must be a positive number, got {value!r}")
        if name in out:
            raise ArgumentError(f"targets: {name} given twice")
        out[str(name)] = value
    if not out:
        raise ArgumentError("targets: no target given (expected FIGURE:STDERR, e.g. efficiency:0.002)")
    return out


def parse_guess(guess) -> dict:
    """``{"efficiency": 0.8}`` or ``"efficiency=0.8,dark=1e-3"`` -> {name: value}."""
    if guess is None:
        return {}
    out = {}
    if isinstance(guess, str):  # empty parts ("a=1,,b=2", a trailing comma) are allowed here
        guess = [part for part in guess.split(",") if part.strip()]
    for name, value in _named_items(guess, "=", "guess", "NAME=VALUE"):
        try:
            out[str(name)] = float(value)
        except (TypeError, ValueError):
            raise ArgumentError(f"guess: {name}: expected a number, got {value!r}") from None
    return out


def _range(value, argument: str) -> tuple[float, float]:
    try:
        lo, hi = (float(v) for v in value)
    except (TypeError, ValueError):
        raise ArgumentError(f"{argument}: expected (min, max) photon numbers, got {value!r}") from None
    if not (math.isfinite(lo) and math.isfinite(hi)) or lo < 0 or hi < lo or hi > MAX_PHOTONS:
        raise ArgumentError(f"{argument}: expected 0 <= min <= max <= {MAX_PHOTONS:g} photons, got ({lo:g}, {hi:g})")
    return lo, hi


def _detector(detector, guess: dict):
    """(model, values, gate duration, calibration of a FitResult, parameters left at their
    default values) from what the user passed."""
    gate, calibration, from_spec = None, None, False
    if isinstance(detector, FitResult):
        model, values, calibration = detector.model, {n: detector.values[n] for n in detector.model.parameter_names}, \
            detector.calibration_uncertainty
    elif isinstance(detector, DetectorRecord):
        model, values, gate = detector.model, dict(detector.parameters), detector.gate_duration_s
    elif isinstance(detector, (str, PathLike)) and (Path(detector).is_file() or str(detector).endswith(".json")):
        record = load_detector(detector)
        model, values, gate = record.model, dict(record.parameters), record.gate_duration_s
    elif isinstance(detector, (str, DetectorModel)):
        model = as_model(detector, "detector")
        values = model.starting_values()
        from_spec = True
        if "efficiency" not in guess:
            raise ArgumentError(f"guess: a model spec ({model.spec}) needs guessed values, at least efficiency=...")
    else:
        raise ArgumentError(f"detector: expected a detector.json path, DetectorRecord, FitResult or model spec, "
                            f"got {type(detector).__name__}")
    names = model.parameter_names
    guessed = set()
    for name, value in guess.items():
        real = [n for n in _ALIASES.get(name, (name,)) if n in names]
        if not real:
            raise ArgumentError(f"guess: {name} is not a parameter of {model.spec} (parameters: {', '.join(names)})")
        lo, hi = model.bounds()[real[0]]
        if not lo <= value <= hi:
            raise ArgumentError(f"guess: {name}={value:g} is outside its range [{lo:g}, {hi:g}]")
        values[real[0]] = value
        guessed.add(real[0])
    defaulted = [n for n in names if from_spec and n not in guessed]
    return model, values, gate, calibration, defaulted


# ----- the entry point --------------------------------------------------------------------------
def plan(detector, targets, *, calibration_uncertainty=None, coherent=(0.0, 20.0), thermal=(0.0, 5.0),
         max_probes: int = 6, min_shots: int = 1000, shots_per_second=None, cross_check: bool = False, guess=None,
         gate_duration=None, baseline=None, progress=None) -> MeasurementPlan:
    """Choose probes and shots that reach target standard errors with the fewest shots.

    Args:
        detector: a ``detector.json`` path, a DetectorRecord, a FitResult, or a model spec
            (``"threshold+dark"``) or DetectorModel with ``guess`` values.
        targets: {figure: absolute standard error}, or ``"FIGURE:STDERR,..."``. Figures: the
            datasheet figures (efficiency, vacuum_click_probability, dark_count_rate_hz with a
            gate duration, crosstalk_probability, ...) and any model parameter name.
        calibration_uncertainty: relative 1-sigma probe calibration (None or 0: exact
            probes; a FitResult's own value is used when None).
        coherent, thermal: (min, max) allowed probe photon numbers.
        max_probes: most distinct probes of the target design (cross-check probes extra).
        min_shots: fewest shots on any probe (a probe of a handful of shots is no measurement,
            and the Gaussian error model behind the design needs counts); default 1000.
        shots_per_second: acquisition rate, for the bench time.
        cross_check: add the cheapest probes that make the pointwise Wigner cross-check
            possible (a second thermal level at each planned displacement).
        guess: {name: value} or ``"efficiency=0.8,dark=1e-3"``; overrides the detector's
            values (``dark``, ``crosstalk``, ``readout`` name the feature's parameter).
        gate_duration: gate or window in seconds (dark count rates); default the detector's.
        baseline: (coherent, thermal) arrays of the uniform grid to compare with; default 9 x 4
            levels evenly spaced over the allowed ranges.
        progress: optional ``progress(task, done, total)`` callback.

    Raises:
        ArgumentError: a bad argument, an unknown figure, or a target below the floor the
            probe calibration leaves (the message gives the floor).
        NotIdentifiable: no design over the allowed probes determines every parameter.
    """
    guess = parse_guess(guess)
    targets = parse_targets(targets)
    model, values, gate, fit_calibration, defaulted = _detector(detector, guess)
    calibration = as_calibration_uncertainty(calibration_uncertainty if calibration_uncertainty is not None
                                             else fit_calibration)
    coherent_range, thermal_range = _range(coherent, "coherent"), _range(thermal, "thermal")
    if coherent_range[1] + thermal_range[1] <= 0:
        raise ArgumentError("coherent, thermal: the ranges allow no light; a detector cannot be characterised in the dark")
    if isinstance(max_probes, bool) or not isinstance(max_probes, int) or max_probes < 1:
        raise ArgumentError(f"max_probes: expected a whole number >= 1, got {max_probes!r}")
    if isinstance(min_shots, bool) or not isinstance(min_shots, int) or min_shots < 1:
        raise ArgumentError(f"min_shots: expected a whole number >= 1, got {min_shots!r}")
    if shots_per_second is not None and not (isinstance(shots_per_second, (int, float)) and shots_per_second > 0
                                             and math.isfinite(shots_per_second)):
        raise ArgumentError(f"shots_per_second: expected a positive rate, got {shots_per_second!r}")
    if gate_duration is not None:
        if not (isinstance(gate_duration, (int, float)) and gate_duration > 0):
            raise ArgumentError(f"gate_duration: expected a positive number of seconds, got {gate_duration!r}")
        gate = float(gate_duration)
    if cross_check and thermal_range[1] <= 0:
        raise ArgumentError("cross_check: the pointwise Wigner cross-check needs thermal probes; allow thermal photons above 0")
    calibrated = calibration is not None

    report = progress or (lambda task, done, total: None)
    report("planning", 0, 3)
    cand_a, cand_t = planning.candidate_grid(coherent_range, thermal_range)
    base_a, base_t = _baseline(baseline, coherent_range, thermal_range)
    extra_a, extra_t = _cross_check_levels(cand_a, cand_t, thermal_range) if cross_check else (np.zeros(0), np.zeros(0))
    all_a = np.concatenate([cand_a, base_a, extra_a])
    all_t = np.concatenate([cand_t, base_t, extra_t])
    info, _, povm = planning.probe_information(model, values, all_a, all_t, calibrated)
    n_cand, n_base = len(cand_a), len(base_a)
    report("planning", 1, 3)

    # targets and the identifiability rows
    gradients, limits, names = [], [], []
    for name, target in targets.items():
        if name in ("dark_count_rate_hz", "dark_count_rate_per_pixel_hz") and not gate:
            raise ArgumentError(f"targets: {name} needs a gate duration (gate_duration, or a detector file with one)")
        found = planning.figure_gradient(model, values, name, calibrated, povm, gate)
        if found is None:
            raise ArgumentError(f"targets: unknown figure {name!r} for {model.spec}; known: "
                                f"{', '.join(_known_figures(model, values, calibrated, povm, gate))}")
        gradients.append(found[1])
        limits.append(target)
        names.append(name)
    n_targets = len(names)
    for name in model.parameter_names:
        gradients.append(planning.figure_gradient(model, values, name, calibrated, povm)[1])
        limits.append(max(IDENTIFIABLE_RELATIVE * abs(values[name]), IDENTIFIABLE_ABSOLUTE))
    gradients, limits = np.array(gradients), np.array(limits)
    base = planning.prior_information(gradients.shape[1], calibration)
    cand_info = info[:n_cand]

    everything = np.ones(n_cand)
    floor = planning.calibration_floor(everything, cand_info, base, gradients)
    for j in range(len(limits)):
        if floor[j] >= limits[j] ** 2 * (1 - 1e-9):
            if j >= n_targets:
                raise NotIdentifiable(f"detector: no probe inside coherent {coherent_range} and thermal {thermal_range} "
                                      f"photons determines {model.parameter_names[j - n_targets]} of {model.spec}")
            why = (f"with a probe calibration of {calibration:g} (relative) its standard error cannot fall below "
                   f"{format_number(math.sqrt(floor[j]), 3)} however many shots are taken" if np.isfinite(floor[j])
                   else "no probe inside the allowed ranges determines it")
            raise ArgumentError(f"targets: {names[j]}:{limits[j]:g} cannot be reached: {why}")

    continuous = planning.optimal_shots(cand_info, base, gradients, limits)
    # the fit's own identifiability rule: settings x (outcomes - 1) >= parameters, and two light
    # levels for a model with dark counts
    min_probes = max(math.ceil(len(model.parameter_names) / (model.n_outcomes - 1)),
                     2 if any(n in dark_parameter_names() for n in model.parameter_names) else 1)
    pruned = planning.prune_design(continuous, cand_info, base, gradients, limits, max_probes, min_probes=min_probes)
    report("planning", 2, 3)
    chosen = np.flatnonzero(pruned > 0)
    if len(chosen) > max_probes:
        raise ArgumentError(f"max_probes: {max_probes} distinct probes cannot meet the targets and identify "
                            f"{model.spec}; at least {len(chosen)} are needed")
    shots = np.maximum(planning.round_shots(pruned, cand_info, base, gradients, limits)[chosen], min_shots)
    coherent_p, thermal_p = cand_a[chosen], cand_t[chosen]
    purposes = ["target"] * len(chosen)
    probe_info = cand_info[chosen]
    target_total = int(shots.sum())

    # cross-check: a second thermal level at every planned displacement
    possible_before = _cross_check_possible(coherent_p, thermal_p)
    added = {"added_probes": 0, "added_shots": 0}
    if cross_check and not possible_before:
        # every displacement with a single thermal level gets a partner probe at a second level
        # with the same shots; a (probe, partner) pair is one design unit of information
        # (I_probe + I_partner)/2 per shot, and the target probes are re-optimised with the pairs
        partners = dict(_cross_check_partners(coherent_p, thermal_p, thermal_range))
        rows = {}
        for index, level in partners.items():
            match = np.flatnonzero((np.abs(extra_a - coherent_p[index]) < 1e-12) & (np.abs(extra_t - level) < 1e-12))
            rows[index] = n_cand + n_base + int(match[0])
        units = np.array([(probe_info[i] + info[rows[i]]) / 2 if i in rows else probe_info[i] for i in range(len(shots))])
        again = planning.optimal_shots(units, base, gradients, limits)
        again = planning.round_shots(again, units, base, gradients, limits)
        again = np.where(again > 0, np.maximum(again, 2 * min_shots), 0)
        pair_shots = {i: int(math.ceil(again[i] / 2)) for i in rows}
        keep = [i for i in range(len(shots)) if again[i] > 0]
        shots = np.array([pair_shots.get(i, again[i]) for i in keep]
                         + [pair_shots[i] for i in rows if again[i] > 0], dtype=np.int64)
        extra = [rows[i] for i in rows if again[i] > 0]
        coherent_p = np.concatenate([coherent_p[keep], all_a[extra]])
        thermal_p = np.concatenate([thermal_p[keep], all_t[extra]])
        purposes = ["target"] * len(keep) + ["cross-check"] * len(extra)
        probe_info = np.concatenate([probe_info[keep], info[extra]])
        added = {"added_probes": len(extra), "added_shots": int(shots.sum()) - target_total}
    total = int(shots.sum())

    order = np.lexsort((thermal_p, coherent_p))
    shots, coherent_p, thermal_p, probe_info = shots[order], coherent_p[order], thermal_p[order], probe_info[order]
    purposes = [purposes[i] for i in order]
    labels = tuple(("x" if p == "cross-check" else "p") + f"{i + 1}_a{a:g}_n{t:g}"
                   for i, (a, t, p) in enumerate(zip(coherent_p, thermal_p, purposes)))

    figures = _predicted_figures(model, values, calibrated, povm, gate, shots, probe_info, base, targets)
    uniform_total = _uniform_total(info[n_cand:n_cand + n_base], base, gradients[:n_targets], limits[:n_targets])
    notes = _notes(figures, calibration)
    if defaulted:
        notes.append("not guessed, so planned at their default values: "
                     + ", ".join(f"{n}={values[n]:g}" for n in defaulted))
    possible = _cross_check_possible(coherent_p, thermal_p)
    if not possible:
        notes.append("the design has no two displacements with probes at two or more thermal levels, so the "
                     "model-free pointwise Wigner cross-check is not possible; ask for the cross-check "
                     "(--cross-check) to add the cheapest probes that allow it")
    curve = _curve(names[0], shots, probe_info, info[n_cand:n_cand + n_base], base, gradients[0], total, uniform_total)
    report("planning", 3, 3)
    return MeasurementPlan(
        model=model, parameters=dict(values), calibration_uncertainty=calibration, targets=dict(targets),
        coherent_photons=coherent_p, thermal_photons=thermal_p, shots=shots, labels=labels, purposes=tuple(purposes),
        total_shots=total, optimal_total=float(continuous.sum()), figures=figures,
        uniform={"coherent_photons": base_a.tolist(), "thermal_photons": base_t.tolist(),
                 "total_shots": uniform_total, "ratio": None if uniform_total is None else uniform_total / total},
        candidates={"coherent_range": list(coherent_range), "thermal_range": list(thermal_range), "count": n_cand},
        shots_per_second=None if shots_per_second is None else float(shots_per_second),
        bench_time_s=None if shots_per_second is None else total / float(shots_per_second),
        cross_check={"requested": bool(cross_check), "possible": possible,
                     "displacements": _displacements_with_two_levels(coherent_p, thermal_p), **added},
        curve=curve, notes=tuple(notes),
    )


# ----- helpers ----------------------------------------------------------------------------------
def _known_figures(model, values, calibrated, povm, gate):
    names = [n for n in FIGURES if planning.figure_gradient(model, values, n, calibrated, povm, gate) is not None]
    return names + [n for n in model.parameter_names if n not in names]


def _baseline(baseline, coherent_range, thermal_range):
    if baseline is not None:
        a, t = (np.asarray(v, dtype=float).ravel() for v in baseline)
        if a.shape != t.shape or a.size == 0 or not np.all(np.isfinite(a) & np.isfinite(t)) or a.min() < 0 or t.min() < 0:
            raise ArgumentError("baseline: expected two equal-length arrays of photon numbers >= 0")
        return a, t
    levels = [np.linspace(lo, hi, n) if hi > lo else np.array([lo]) for (lo, hi), n in
              zip((coherent_range, thermal_range), _UNIFORM_LEVELS)]
    a, t = np.meshgrid(*levels, indexing="ij")
    return a.ravel(), t.ravel()


def _cross_check_levels(cand_a, cand_t, thermal_range):
    """Every candidate displacement at the cross-check's thermal levels (0 and
    CROSS_CHECK_THERMAL, clipped to the range)."""
    levels = np.unique(np.clip([0.0, CROSS_CHECK_THERMAL], *thermal_range))
    a = np.unique(cand_a)
    a, t = np.meshgrid(a, levels, indexing="ij")
    return a.ravel(), t.ravel()


def _cross_check_partners(coherent_p, thermal_p, thermal_range):
    """(probe index, thermal level to add) for every displacement with one thermal level."""
    levels = np.unique(np.clip([0.0, CROSS_CHECK_THERMAL], *thermal_range))
    out = []
    for a in np.unique(coherent_p):
        rows = np.flatnonzero(coherent_p == a)
        if len(np.unique(thermal_p[rows])) >= 2:
            continue
        index = rows[0]
        other = [v for v in levels if abs(v - thermal_p[index]) > 1e-12]
        if other:
            out.append((index, float(other[-1] if thermal_p[index] == 0 else other[0])))
    return out


def _displacements_with_two_levels(coherent_p, thermal_p) -> int:
    return int(sum(len(np.unique(thermal_p[coherent_p == a])) >= 2 for a in np.unique(coherent_p)))


def _cross_check_possible(coherent_p, thermal_p) -> bool:
    return _displacements_with_two_levels(coherent_p, thermal_p) >= 2


def _predicted_figures(model, values, calibrated, povm, gate, shots, info, base, targets) -> dict:
    names = [n for n in FIGURES if planning.figure_gradient(model, values, n, calibrated, povm, gate) is not None]
    names += [n for n in targets if n not in names]
    found = [planning.figure_gradient(model, values, n, calibrated, povm, gate) for n in names]
    gradients = np.array([g for _, g in found])
    shots = np.asarray(shots, float)
    total = planning.variances(shots, info, base, gradients)
    floor = planning.calibration_floor(shots, info, base, gradients)
    n_model = len(model.parameter_names)
    data = np.einsum("c,cij->ij", shots, info)[:n_model, :n_model]
    stat = planning.variances(np.ones(1), data[None], np.zeros((n_model, n_model)), gradients[:, :n_model])
    floor = np.where(floor < 1e-9 * total, 0.0, floor)  # rounding of an exact zero
    stat = np.where(total - stat < 1e-9 * total, total, stat)
    out = {}
    for j, name in enumerate(names):
        stderr, stat_se = math.sqrt(total[j]), math.sqrt(min(stat[j], total[j]))
        calibration_se = math.sqrt(max(total[j] - stat[j], 0.0))
        target = targets.get(name)
        out[name] = {"value": found[j][0], "stderr": stderr, "stat_stderr": stat_se,
                     "calibration_stderr": calibration_se, "floor": math.sqrt(floor[j]) if np.isfinite(floor[j]) else None,
                     "target": target, "met": None if target is None else bool(stderr <= target * (1 + 1e-9)),
                     "calibration_dominated": bool(calibration_se > stat_se)}
    return out


def _uniform_total(info, base, gradients, limits):
    k = planning.scale_to_targets(np.ones(len(info)), info, base, gradients, limits)
    return None if not np.isfinite(k) else float(np.ceil(k * len(info)))


def _notes(figures, calibration) -> list[str]:
    notes = []
    for name, fig in figures.items():
        if fig["calibration_dominated"] and fig["floor"]:
            notes.append(f"{name}: the probe calibration ({calibration:g} relative) dominates its uncertainty; "
                         f"with infinitely many shots its stderr would still be {format_number(fig['floor'], 3)}")
    return notes


def _curve(name, shots, info, uniform_info, base, gradient, total, uniform_total, points: int = 61):
    top = max(total, uniform_total or total) * 30.0
    totals = np.geomspace(total / 30.0, top, points)
    planned_w = np.asarray(shots, float) / total
    uniform_w = np.full(len(uniform_info), 1.0 / len(uniform_info))
    g = gradient[None]
    planned = [math.sqrt(planning.variances(n * planned_w, info, base, g)[0]) for n in totals]
    uniform = [math.sqrt(v) if np.isfinite(v := planning.variances(n * uniform_w, uniform_info, base, g)[0]) else None
               for n in totals]
    return {"figure": name, "total_shots": totals.tolist(), "planned_stderr": planned, "uniform_stderr": uniform}
