"""Model ranking on simulated detectors.

Criteria and their sources: BIC (Schwarz, Ann. Stat. 6, 461 (1978)) is consistent, so with
10^5 shots per probe the true model wins; the boundary-corrected likelihood-ratio test
(Self & Liang, J. Am. Stat. Assoc. 82, 605 (1987)) gives p = 0.5 P(chi2_1 > stat); absolute
adequacy is the deviance goodness-of-fit p-value (chi-square approximation, common practice,
no source). Scans are simulated here from exact model probabilities with fixed seeds.
"""
import dataclasses
import json

import numpy as np
import pytest
from scipy import stats

from povmfit.fitting.data.errors import ArgumentError
from povmfit.fitting.inference.compare import candidate_models, compare_models
from povmfit.fitting.inference.fit import fit_scan
from povmfit.models import parse_model_spec

from simulated import Experiment

COHERENT = np.concatenate([[0.0], np.linspace(0.3, 5.0, 14)])

CASES = [
    # (true spec, truth, families offered)
    ("array:4+dark+crosstalk", {"efficiency": 0.7, "dark_probability": 3e-3, "crosstalk_probability": 0.05}, ("array",)),
    ("pnr:4+dark+readout", {"efficiency": 0.85, "dark_mean": 0.02, "readout_width": 0.3}, ("pnr",)),
    ("threshold+dark", {"efficiency": 0.4, "dark_probability": 1e-3}, ("threshold",)),
]


def _ranking(spec, truth, families, seed, shots=100_000):
    experiment = Experiment(spec, truth, COHERENT, shots=shots)
    scan = experiment.scan(np.random.default_rng(seed))
    model = parse_model_spec(spec)
    candidates = [m for m in candidate_models(scan.n_outcomes, families=families)
                  if "unequal_split" not in m.features]
    return compare_models(scan, candidates, cv_folds=0), model


@pytest.mark.parametrize("spec,truth,families", CASES)
def test_true_model_is_chosen_and_adequate(spec, truth, families):
    comparison, model = _ranking(spec, truth, families, seed=11)
    assert comparison.chosen == model
    assert comparison.table[0]["adequate"]
    assert "explains the data" in comparison.verdict


def test_absent_feature_is_not_selected_across_seeds():
    # An array with dark counts only: crosstalk and readout are absent. BIC's penalty
    # ln(total shots) ~ 21 makes a false inclusion need a chi2_1 excursion above 21
    # (probability ~ 2e-6), so 0 of 4 seeds is expected; the issue asks for <= 1 of 10.
    truth = {"efficiency": 0.6, "dark_probability": 2e-3}
    chosen = [_ranking("array:4+dark", truth, ("array",), seed)[0].chosen.spec for seed in range(4)]
    assert chosen.count("array:4+dark") >= 3, chosen


def test_boundary_corrected_lrt_p_value():
    comparison, _ = _ranking("array:4+dark", {"efficiency": 0.6, "dark_probability": 2e-3}, ("array",), seed=3)
    test = next(t for t in comparison.tests if t["null"] == "array:4+dark" and t["feature"] == "crosstalk")
    # Self & Liang (1987): 50:50 mixture of chi2_0 and chi2_1
    expected = 0.5 * stats.chi2.sf(test["statistic"], 1) if test["statistic"] > 0 else 1.0
    assert test["p_value"] == pytest.approx(expected, rel=1e-12)


def test_inadequate_candidates_are_reported():
    # An array scan offered only pnr candidates: no pnr chain reproduces pixel saturation
    # at 10^5 shots, so every candidate fails the goodness-of-fit test.
    truth = {"efficiency": 0.7, "dark_probability": 3e-3, "crosstalk_probability": 0.05}
    comparison, _ = _ranking("array:4+dark+crosstalk", truth, ("pnr",), seed=5)
    assert not comparison.table[0]["adequate"]
    assert comparison.verdict.startswith("No candidate describes the data adequately")


def test_candidate_sets_follow_the_outcomes():
    assert [m.spec for m in candidate_models(2)] == ["threshold", "threshold+dark"]
    specs = {m.spec for m in candidate_models(9)}
    assert "pnr:8+dark+crosstalk+readout" in specs and "array:8+dark+crosstalk+readout+unequal_split" in specs
    assert len(specs) == 8 + 16


def test_shared_compiled_code_gives_the_same_fit():
    # a candidate fitted inside the family's largest model equals its own direct fit
    truth = {"efficiency": 0.6, "dark_probability": 2e-3}
    scan = Experiment("array:4+dark", truth, COHERENT, shots=20_000).scan(np.random.default_rng(2))
    model = parse_model_spec("array:4+dark")
    direct = fit_scan(scan, model, intervals=False)
    shared = fit_scan(scan, model, compute_model=parse_model_spec("array:4+dark+crosstalk+readout"), intervals=False)
    for name in model.parameter_names:
        assert shared.values[name] == pytest.approx(direct.values[name], rel=1e-6, abs=1e-9)
    assert shared.deviance == pytest.approx(direct.deviance, rel=1e-8)


@pytest.mark.slow
@pytest.mark.parametrize("spec,truth,families", CASES + [
    ("array:4+dark", {"efficiency": 0.6, "dark_probability": 2e-3}, ("array",)),
    ("pnr:4+dark+crosstalk", {"efficiency": 0.8, "dark_mean": 0.03, "crosstalk_probability": 0.08}, ("pnr",)),
])
def test_selection_rate_over_ten_seeds(spec, truth, families):
    # Issue target: the true model in >= 9 of 10 seeds, an absent feature in <= 1 of 10
    # (BIC consistency, Schwarz 1978; 10^4 shots per probe, the low end of realistic scans).
    model = parse_model_spec(spec)
    chosen = [_ranking(spec, truth, families, seed, shots=10_000)[0].chosen for seed in range(10)]
    assert sum(c == model for c in chosen) >= 9, [c.spec for c in chosen]
    extra = [c for c in chosen if set(c.features) - set(model.features)]
    assert len(extra) <= 1, [c.spec for c in extra]


def test_comparison_views_agree_with_the_table():
    # views of one ranking (threshold family, 2 candidates): plumbing checks against the
    # table itself, no numeric source needed beyond equality
    truth = {"efficiency": 0.4, "dark_probability": 1e-3}
    scan = Experiment("threshold+dark", truth, COHERENT, shots=20_000).scan(np.random.default_rng(8))
    calls = []
    comparison = compare_models(scan, ["threshold", "threshold+dark"], cv_folds=0,
                                progress=lambda *args: calls.append(args))
    # the two candidates share one program (the family's largest model), compiled first
    assert calls == [("compiling models", 0, 1), ("compiling models", 1, 1),
                     ("model ranking", 0, 2), ("model ranking", 1, 2), ("model ranking", 2, 2)]
    with pytest.raises(dataclasses.FrozenInstanceError):
        comparison.chosen = None
    rows = comparison.rows()
    assert [r["model"] for r in rows] == [r["model"] for r in comparison.table]
    payload = json.loads(json.dumps(comparison.to_dict(), allow_nan=False))
    assert payload["chosen"] == comparison.chosen.spec and payload["verdict"] == comparison.verdict
    assert [r["model"] for r in payload["candidates"]] == [r["model"] for r in rows]
    frame = comparison.to_dataframe()
    assert list(frame.index) == [r["model"] for r in rows]
    assert list(frame["bic"]) == [r["bic"] for r in rows]
    text = comparison.summary()
    for row in rows:
        assert row["model"] in text and f"{row['deviance']:.2f}" in text
    cut = comparison.summary(max_rows=1)
    assert "best 1 shown" in cut and rows[1]["model"] + " " not in cut.split("\n\n")[1]
    assert "<table>" in comparison._repr_html_()


def test_bad_candidates_and_options_name_the_argument():
    scan = Experiment("threshold+dark", {"efficiency": 0.4, "dark_probability": 1e-3}, COHERENT,
                      shots=1_000).scan(np.random.default_rng(1))
    with pytest.raises(ArgumentError, match="^candidates"):
        compare_models(scan, ["threshold+glitter"])
    with pytest.raises(ArgumentError, match="^cv_folds"):
        compare_models(scan, ["threshold"], cv_folds=-2)
