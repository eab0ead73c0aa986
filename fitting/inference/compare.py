"""Which physical model explains a detector: candidate generation, fits and ranking.

Candidates follow from the number of outcomes of the scan: 2 outcomes -> ``threshold`` with
and without dark clicks; K+1 outcomes -> ``pnr:K`` and ``array:K``, each with every subset of
the features dark, crosstalk, readout (and, for arrays of at most 16 pixels, unequal split).
All candidates of one family are fitted with the compiled code of the family's largest model,
the missing features switched off, so a ranking costs one compilation per family.

Criteria (each reported in the table):
- AIC = D + 2k and BIC = D + k ln(total shots), D the deviance, k the number of parameters
  (Akaike 1974; Schwarz 1978); Akaike weights exp(-dAIC/2) normalised.
- goodness of fit: the deviance against chi2 with n_probes (K) - k degrees of freedom; a
  model with p < ``ADEQUACY_LEVEL`` is called inadequate.
- likelihood-ratio tests between nested candidates differing by one feature. A feature
  switched off sits on the boundary of its range (dark, crosstalk = 0; readout width at its
  floor), so the statistic follows the 50:50 mixture of chi2_0 and chi2_1 (Self & Liang,
  J. Am. Stat. Assoc. 82, 605 (1987)); the unequal split adds N-1 interior parameters (chi2_{N-1}).
- held-out-probe cross-validation (predictive deviance on folds of probes) for the leading
  candidates (at most ``cv_top``, each within ``CV_BIC_WINDOW`` of the best BIC), as a second
  opinion where the criteria are close.
The chosen model is the adequate candidate with the lowest BIC (the lowest BIC overall when
none is adequate, and the verdict says so).
"""
from __future__ import annotations

import math
import sys
import warnings
from dataclasses import dataclass

import numpy as np
from scipy.special import chdtrc

from povmfit.models import DetectorModel, parse_model_spec

from povmfit.fitting.inference.candidates import candidate_models, family_compute_model, ranking_order
from povmfit.fitting.inference.fit import FitNotConverged, FitResult, fit_scan
from povmfit.fitting.inference.objective import cell_residuals
from povmfit.fitting.data.errors import NotIdentifiable

__all__ = ["candidate_models", "compare_models", "Comparison", "ADEQUACY_LEVEL"]

ADEQUACY_LEVEL = 0.01
CV_BIC_WINDOW = 10.0  # delta BIC beyond which the evidence is already "very strong" (Kass & Raftery 1995)
LRT_LEVEL = 0.05


@dataclass(frozen=True)
class Comparison:
    """Result of ``compare_models``.

    Attributes:
        table: one dict per candidate, best first (model, parameters, deviance, dof, p_value,
            adequate, aic, bic, delta_aic, delta_bic, weight, cv_deviance, converged).
        tests: likelihood-ratio tests between nested candidates (dicts).
        chosen: the chosen DetectorModel; fits: {spec: FitResult}.
        verdict: one sentence for the datasheet and the terminal.
        skipped: {spec: reason} for candidates the scan cannot identify.
    """

    table: list
    tests: list
    chosen: DetectorModel
    fits: dict
    verdict: str
    skipped: dict

    def to_dict(self) -> list:
        return [dict(row) for row in self.table]


def _lrt(small: FitResult, big: FitResult, added: str) -> dict:
    statistic = max(small.deviance - big.deviance, 0.0)
    extra = len(big.names) - len(small.names)
    if added == "unequal_split":
        p_value, reference = chdtrc(extra, statistic), f"chi2_{extra}"
    else:
        p_value, reference = 0.5 * chdtrc(1, statistic) if statistic > 0 else 1.0, "chi2_0:chi2_1 50:50"
    return {
        "null": small.model.spec,
        "alternative": big.model.spec,
        "feature": added,
        "statistic": float(statistic),
        "reference": reference,
        "p_value": float(p_value),
        "feature_needed": bool(p_value < LRT_LEVEL),
    }


def _fit_with_nested_start(scan, model, fits, calibration_uncertainty) -> FitResult:
    """Fit ``model`` starting from the estimates of its best nested candidate (new parameters at
    their defaults); from the moment-based start when there is none, or when the nested start
    ends worse than the nested model itself (which the larger model contains)."""
    compute = family_compute_model(model)
    nested = [f for f in fits.values() if f.model.family == model.family and f.model.saturation == model.saturation
              and set(f.model.features) < set(model.features)]
    if nested:
        best = min(nested, key=lambda f: f.deviance)
        fit = fit_scan(scan, model, calibration_uncertainty, compute_model=compute, intervals=False, initial=best.values)
        if fit.deviance <= best.deviance + 1e-6 * max(1.0, best.deviance):
            return fit
    return fit_scan(scan, model, calibration_uncertainty, compute_model=compute, intervals=False)


def _cross_validation(scan, full_fit, compute, folds: int, seed: int, calibration_uncertainty) -> float:
    """Sum over folds of the deviance of held-out probes under the fit to the others (each fold's
    fit starts from the estimates on all probes)."""
    model = full_fit.model
    fold_of = np.random.default_rng(seed).permutation(scan.n_probes) % folds
    total = 0.0
    for fold in range(folds):
        held = fold_of == fold
        try:
            with warnings.catch_warnings():
                warnings.simplefilter("ignore", FitNotConverged)
                fit = fit_scan(scan, model, calibration_uncertainty, compute_model=compute, intervals=False,
                               probe_mask=~held, initial=full_fit.values)
        except NotIdentifiable:
            return float("nan")
        q = fit.predicted[held]
        total += float(np.sum(cell_residuals(q, scan.counts[held].astype(float), scan.shots[held].astype(float)) ** 2))
    return total


def compare_models(
    scan,
    candidates=None,
    calibration_uncertainty=None,
    cv_folds: int = 5,
    cv_top: int = 3,
    seed: int = 0,
    quiet: bool = True,
) -> Comparison:
    """Fit every candidate (default: ``candidate_models(scan.n_outcomes)``) and rank them."""
    if candidates is None:
        candidates = candidate_models(scan.n_outcomes)
    candidates = [parse_model_spec(c) if isinstance(c, str) else c for c in candidates]
    if not candidates:
        raise NotIdentifiable(f"{scan.source}: no candidate model fits a scan with {scan.n_outcomes} outcomes")
    fits, skipped = {}, {}
    show = not quiet and sys.stderr.isatty()
    ordered = ranking_order(candidates)
    for i, model in enumerate(ordered):
        if show:
            print(f"\rranking models {i + 1}/{len(ordered)}: {model.spec:<50}", end="", file=sys.stderr, flush=True)
        try:
            with warnings.catch_warnings():
                warnings.simplefilter("ignore", FitNotConverged)
                fits[model.spec] = _fit_with_nested_start(scan, model, fits, calibration_uncertainty)
        except NotIdentifiable as error:
            skipped[model.spec] = str(error)
    if show:
        print(file=sys.stderr)
    if not fits:
        raise NotIdentifiable(next(iter(skipped.values())))

    total_shots = float(np.sum(scan.shots))
    rows = []
    for spec, fit in fits.items():
        k = len(fit.model.parameter_names)
        rows.append({
            "model": spec,
            "parameters": k,
            "deviance": fit.deviance,
            "dof": fit.dof,
            "p_value": fit.p_value,
            "adequate": bool(fit.p_value >= ADEQUACY_LEVEL) if math.isfinite(fit.p_value) else False,
            "aic": fit.deviance + 2 * k,
            "bic": fit.deviance + k * math.log(total_shots),
            "converged": fit.converged,
        })
    best_aic = min(r["aic"] for r in rows)
    best_bic = min(r["bic"] for r in rows)
    weights = np.array([math.exp(-(r["aic"] - best_aic) / 2) for r in rows])
    weights /= weights.sum()
    for row, w in zip(rows, weights):
        row["delta_aic"] = row["aic"] - best_aic
        row["delta_bic"] = row["bic"] - best_bic
        row["weight"] = float(w)
        row["cv_deviance"] = None
    rows.sort(key=lambda r: (not r["adequate"], r["bic"]))
    leading = [r for r in rows[:cv_top] if r["bic"] - rows[0]["bic"] <= CV_BIC_WINDOW]
    for row in leading if cv_folds and scan.n_probes >= 2 * cv_folds else []:
        fit = fits[row["model"]]
        row["cv_deviance"] = _cross_validation(scan, fit, family_compute_model(fit.model), cv_folds, seed, calibration_uncertainty)

    tests = []
    by_features = {(f.model.family, f.model.features): f for f in fits.values()}
    for (family, features), big in by_features.items():
        for feature in features:
            smaller = tuple(x for x in features if x != feature)
            small = by_features.get((family, smaller))
            if small is not None:
                tests.append(_lrt(small, big, feature))

    chosen_row = rows[0]
    chosen = fits[chosen_row["model"]].model
    verdict = _verdict(chosen_row, rows, tests, chosen)
    return Comparison(rows, tests, chosen, fits, verdict, skipped)


def _verdict(chosen_row, rows, tests, chosen) -> str:
    if not chosen_row["adequate"]:
        return (
            f"No candidate describes the data adequately: the best, {chosen.spec}, has goodness-of-fit "
            f"p = {chosen_row['p_value']:.2g}; the detector needs a model povmfit does not have."
        )
    needed = [t["feature"] for t in tests if t["alternative"] == chosen.spec and t["feature_needed"]]
    alternatives = [r for r in rows[1:] if r["adequate"]]
    margin = f"; next best {alternatives[0]['model']} at delta BIC {alternatives[0]['bic'] - chosen_row['bic']:.1f}" if alternatives else ""
    features = ", ".join(needed) if needed else "no extra features"
    return (
        f"{chosen.spec} explains the data (goodness-of-fit p = {chosen_row['p_value']:.2g}, lowest BIC "
        f"among adequate models{margin}); likelihood-ratio tests require {features}."
    )
