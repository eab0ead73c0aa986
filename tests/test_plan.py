"""Measurement planning: the per-shot Fisher information, the optimal design, floors, rounding,
the cross-check probes and the accepted inputs.

Sources: the on/off Fisher information with a coherent probe, I(eta) = m^2 (1-p)/p with
p = 1 - (1-d) exp(-eta m) (REFERENCES.md); the no-click probability of a displaced thermal
probe (A, nbar) behind loss eta and dark probability d, (1-d) exp(-eta A/(1+eta nbar))/(1+eta nbar)
(Lachs, Phys. Rev. 138, B1012 (1965), thinned by binomial loss; an independent closed form);
the loss/calibration degeneracy of DESIGN.md section 2; cvxpy (a general-purpose convex solver)
for the optimal designs.
"""
from __future__ import annotations

import math

import cvxpy as cp
import numpy as np
import pytest

from povmfit.fitting.data.detector_file import DetectorRecord, save_detector
from povmfit.fitting.data.errors import ArgumentError
from povmfit.fitting.inference import planning
from povmfit.fitting.workflow.plan import MeasurementPlan, plan
from povmfit.models import parse_model_spec

MODEL = parse_model_spec("threshold+dark")
VALUES = {"efficiency": 0.8, "dark_probability": 0.01}
GUESS = "efficiency=0.8,dark=0.01"


def _no_click(eta, d, s, coherent, thermal):
    """Closed-form no-click probability of a displaced thermal probe (source in the docstring)."""
    a, n = s * coherent, s * thermal
    return (1 - d) * np.exp(-eta * a / (1 + eta * n)) / (1 + eta * n)


@pytest.fixture(scope="module")
def candidates():
    return planning.candidate_grid((0, 20), (0, 5))


@pytest.fixture(scope="module")
def calibrated_information(candidates):
    return planning.probe_information(MODEL, VALUES, *candidates, calibrated=True)


def test_information_matches_the_on_off_closed_form(calibrated_information, candidates):
    coherent, thermal = candidates
    info = calibrated_information[0]
    pure = thermal == 0
    m = coherent[pure]
    p = 1 - (1 - 0.01) * np.exp(-0.8 * m)
    # I(eta) = m^2 (1-p)/p (REFERENCES.md, on/off Fisher information); at m = 0 it is 0
    np.testing.assert_allclose(info[pure, 0, 0], m**2 * (1 - p) / p, rtol=1e-9, atol=1e-300)


def test_information_matches_finite_differences_of_the_closed_form(calibrated_information, candidates):
    """Every entry (efficiency, dark, probe scale) against central differences of the
    closed-form no-click probability (independent computation; step 1e-6, error ~1e-10)."""
    coherent, thermal = candidates
    x0, h = np.array([0.8, 0.01, 1.0]), 1e-6
    grads = []
    for i in range(3):
        up, down = x0.copy(), x0.copy()
        up[i] += h
        down[i] -= h
        grads.append((_no_click(*up, coherent, thermal) - _no_click(*down, coherent, thermal)) / (2 * h))
    grads = np.array(grads).T  # (C, 3): d p0 / d x
    p0 = _no_click(*x0, coherent, thermal)
    expected = grads[:, :, None] * grads[:, None, :] * (1 / p0 + 1 / (1 - p0))[:, None, None]
    np.testing.assert_allclose(calibrated_information[0], expected, rtol=1e-6, atol=1e-9)


def _cvxpy_total(info, base, gradients, targets):
    """min sum n s.t. g^T (B + sum n_c I_c)^{-1} g <= t^2 as an SDP (cvxpy matrix_frac)."""
    scale = 1e5
    n = cp.Variable(len(info), nonneg=True)
    matrix = base / scale + sum(n[c] * info[c] for c in range(len(info)))
    constraints = [cp.matrix_frac(g, matrix) <= t**2 * scale for g, t in zip(gradients, targets)]
    problem = cp.Problem(cp.Minimize(cp.sum(n)), constraints)
    problem.solve(solver="CLARABEL")
    return problem.value * scale


@pytest.mark.parametrize("calibration", [None, 0.02])
def test_optimal_design_matches_a_convex_solver(calibrated_information, candidates, calibration):
    every = slice(None, None, 5)  # a coarser candidate set keeps the SDP small
    info, _, povm = calibrated_information
    calibrated = calibration is not None
    info = info[every] if calibrated else info[every][:, :2, :2]  # exact probes: the model block
    base = planning.prior_information(info.shape[1], calibration)
    names = ("efficiency", "vacuum_click_probability")
    gradients = np.array([planning.figure_gradient(MODEL, VALUES, n, calibrated, povm)[1] for n in names])
    targets = np.array([0.02, 5e-4])
    shots = planning.optimal_shots(info, base, gradients, targets)
    # the same convex problem solved by cvxpy (interior point, relative accuracy ~1e-8)
    assert shots.sum() == pytest.approx(_cvxpy_total(info, base, gradients, targets), rel=1e-5)
    assert np.all(np.sqrt(planning.variances(shots, info, base, gradients)) <= targets * (1 + 1e-6))


def test_single_target_design_is_the_closed_form_optimum():
    """Loss only, exact probes: the best probe maximises I = m^2 e^{-eta m}/(1 - e^{-eta m})
    (REFERENCES.md, d = 0), at eta m = x with 2(1 - e^{-x}) = x, and needs 1/(I t^2) shots."""
    model = parse_model_spec("threshold")
    from scipy.optimize import brentq

    x = brentq(lambda v: 2 * (1 - math.exp(-v)) - v, 0.5, 3)  # independent root (x = 1.5936)
    eta, target = 0.5, 0.005
    m = x / eta
    best = m**2 * math.exp(-eta * m) / (1 - math.exp(-eta * m))
    result = plan(model, {"efficiency": target}, guess={"efficiency": eta})
    exact = 1 / (best * target**2)
    # geometric candidates 3 significant digits apart by ~20 %: the flat optimum loses < 1 %;
    # rounding up to 3 significant digits adds < 1 %
    assert exact <= result.total_shots <= exact * 1.02
    assert result.n_probes == 1 and abs(result.coherent_photons[0] - m) / m < 0.2
    assert result.thermal_photons[0] == 0


def test_uniform_grid_total_from_the_closed_form():
    """Equal shots on the 9 x 4 uniform grid need 1/(t^2 mean_c I_c) shots for a 1-parameter
    model (closed-form I from the displaced-thermal no-click probability)."""
    eta, target = 0.5, 0.005
    result = plan("threshold", {"efficiency": target}, guess={"efficiency": eta})
    a = np.array(result.uniform["coherent_photons"])
    t = np.array(result.uniform["thermal_photons"])
    h = 1e-6
    slope = (_no_click(eta + h, 0, 1, a, t) - _no_click(eta - h, 0, 1, a, t)) / (2 * h)
    p0 = _no_click(eta, 0, 1, a, t)
    with np.errstate(divide="ignore", invalid="ignore"):
        info = np.where((p0 > 0) & (p0 < 1), slope**2 / (p0 * (1 - p0)), 0.0)
    expected = 1 / (target**2 * info.mean())
    assert result.uniform["total_shots"] == pytest.approx(expected, rel=1e-5)
    assert result.uniform["ratio"] > 2  # planned beats the uniform grid (here about 7x)


@pytest.fixture(scope="module")
def calibrated_plan():
    return plan("threshold+dark", {"efficiency": 0.01}, guess=GUESS, calibration_uncertainty=0.01, shots_per_second=1e5)


def test_calibration_floor_is_efficiency_times_calibration(calibrated_plan):
    # loss and probe scale are degenerate (DESIGN.md section 2): infinitely many shots leave
    # sd(eta) = eta * sigma = 0.8 * 0.01
    figure = calibrated_plan.figures["efficiency"]
    assert figure["floor"] == pytest.approx(0.008, rel=1e-6)
    assert figure["calibration_dominated"] and any("0.008" in note for note in calibrated_plan.notes)
    assert figure["stderr"] <= 0.01 and figure["met"]
    assert figure["stderr"] ** 2 == pytest.approx(figure["stat_stderr"] ** 2 + figure["calibration_stderr"] ** 2)


def test_target_below_the_floor_is_refused_with_the_floor():
    with pytest.raises(ArgumentError, match=r"efficiency:0.005 cannot be reached.*0\.008"):
        plan("threshold+dark", {"efficiency": 0.005}, guess=GUESS, calibration_uncertainty=0.01)


def test_plan_rounds_up_and_keeps_every_target(calibrated_plan):
    p = calibrated_plan
    assert p.shots.dtype.kind == "i" and np.all(p.shots > 0)
    for n in p.shots:  # at most 3 significant digits
        assert int(str(int(n))[:3].ljust(len(str(int(n))), "0")) == n
    assert p.total_shots == int(p.shots.sum()) >= p.optimal_total
    # rounding and pruning cost little here; the 1000-shot floor per probe may add up to 1000 each
    assert p.total_shots <= p.optimal_total * 1.02 + 1000 * p.n_probes
    assert np.all(p.shots >= 1000)
    assert p.bench_time_s == pytest.approx(p.total_shots / 1e5)


def test_cross_check_probes_on_request(calibrated_plan):
    assert not calibrated_plan.cross_check["possible"]
    assert any("cross-check" in note for note in calibrated_plan.notes)
    p = plan("threshold+dark", {"efficiency": 0.01}, guess=GUESS, calibration_uncertainty=0.01, cross_check=True)
    assert p.cross_check["possible"] and p.cross_check["displacements"] >= 2
    for a in np.unique(p.coherent_photons):  # every displacement at two thermal levels
        assert len(np.unique(p.thermal_photons[p.coherent_photons == a])) >= 2
    assert "cross-check" in p.purposes and p.figures["efficiency"]["met"]
    assert p.cross_check["added_shots"] == p.total_shots - calibrated_plan.total_shots


def test_every_input_kind_gives_the_same_plan(tmp_path):
    from povmfit.fitting.data.scan import scan_from_arrays
    from povmfit.fitting.inference.fit import fit_scan

    values = {"efficiency": 0.8, "dark_probability": 0.01}
    record = DetectorRecord(MODEL, values, np.diag([1e-4, 1e-6]), None, {})
    path = tmp_path / "detector.json"
    save_detector(record, path)
    reference = plan("threshold+dark", {"efficiency": 0.01}, guess=GUESS)
    for detector in (record, path, str(path)):
        other = plan(detector, {"efficiency": 0.01})
        np.testing.assert_array_equal(other.shots, reference.shots)
    # a FitResult: its estimates are the design point
    scan = scan_from_arrays(np.array([0.0, 2.22]), np.zeros(2), np.array([[99000, 1000], [25000, 75000]]))
    fitted = fit_scan(scan, MODEL, intervals=False)
    from_fit = plan(fitted, {"efficiency": 0.01})
    assert from_fit.parameters == {n: fitted.values[n] for n in MODEL.parameter_names}


@pytest.mark.parametrize("kwargs, message", [
    ({"targets": {"eff": 0.01}}, "unknown figure 'eff'"),
    ({"targets": "efficiency"}, "expected FIGURE:STDERR"),
    ({"targets": {"efficiency": -1}}, "positive"),
    ({"targets": {"crosstalk_probability": 0.01}}, "unknown figure"),
    ({"targets": {"dark_count_rate_hz": 10.0}}, "needs a gate duration"),
    ({"coherent": (5, 1)}, "coherent: expected 0 <= min <= max"),
    ({"coherent": (0, 0), "thermal": (0, 0)}, "no light"),
    ({"thermal": (-1, 2)}, "thermal"),
    ({"max_probes": 0}, "max_probes"),
    ({"guess": "efficiency=1.5"}, "outside its range"),
    ({"guess": "efficiency=0.8,pixels=3"}, "not a parameter"),
    ({"max_probes": 1}, "max_probes: 1"),
    ({"shots_per_second": -1}, "shots_per_second"),
    ({"cross_check": True, "thermal": (0, 0)}, "cross_check"),
])
def test_refusals_name_the_argument(kwargs, message):
    arguments = {"targets": {"efficiency": 0.01}, "guess": GUESS, **kwargs}
    with pytest.raises(ArgumentError, match=message) as caught:
        plan("threshold+dark", **arguments)
    assert "\n" not in str(caught.value)


def test_result_views(calibrated_plan):
    p = calibrated_plan
    assert isinstance(p, MeasurementPlan)
    frame = p.to_dataframe()
    assert list(frame.columns) == ["probe", "coherent_photons", "thermal_photons", "shots", "purpose"]
    data = p.to_dict()
    assert data["model"] == "threshold+dark" and data["total_shots"] == p.total_shots
    import json

    json.dumps(data, allow_nan=False)
    assert "threshold+dark" in p.summary() and "<table>" in p._repr_html_()
    with pytest.raises(AttributeError):
        p.total_shots = 1  # frozen
