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

A fixed readout matrix M (``fixed_readout=``, from a pulse-height tally) is put after every
candidate without the ``readout`` feature (specs ``...+fixed_readout``); the candidates with
the ``readout`` feature are fitted without it, so the ranking compares the readout measured
from the pulse heights with the one fitted to the counts. Nested starts and likelihood-ratio
tests pair only candidates that agree on the fixed readout.
"""
from __future__ import annotations

import math
import warnings
from dataclasses import dataclass

import numpy as np
from scipy.special import chdtrc

from povmfit.models import DetectorModel, parse_model_spec

from povmfit.fitting.inference.candidates import candidate_models, family_compute_model, ranking_order
from povmfit.fitting.data.errors import ArgumentError, FitError, NotIdentifiable
from povmfit.fitting.display import format_number, format_p_value, html_block, html_table, text_table
from povmfit.fitting.inference.fit import FitNotConverged, FitResult, fit_scan
from povmfit.fitting.inference.objective import cell_residuals, compile_programs, fit_cutoff
from povmfit.fitting.inference.result import jsonable

__all__ = ["candidate_models", "compare_models", "Comparison", "ADEQUACY_LEVEL", "shared_compute_model",
           "attach_fixed_readout"]

ADEQUACY_LEVEL = 0.01
CV_BIC_WINDOW = 10.0  # delta BIC beyond which the evidence is already "very strong" (Kass & Raftery 1995)
LRT_LEVEL = 0.05


@dataclass(frozen=True)
class Comparison:
    """Result of ``compare_models``: every candidate fitted and ranked.

    Frozen: no field can be reassigned (the rows are plain dicts, shared with the fits'
    readers; treat them as read-only).

    Attributes:
        table: tuple of one dict per fitted candidate, best first (adequate candidates by
            BIC, then the inadequate ones by BIC). Keys: ``model`` (spec), ``parameters``
            (k), ``deviance``, ``dof``, ``p_value`` (goodness of fit), ``adequate``
            (p >= ADEQUACY_LEVEL), ``aic``, ``bic``, ``delta_aic``, ``delta_bic`` (to the
            lowest of all candidates), ``weight`` (Akaike weight), ``cv_deviance`` (held-out
            deviance, None where not computed), ``converged``.
        tests: tuple of likelihood-ratio tests between nested candidates, one dict each:
            ``null``, ``alternative``, ``feature``, ``statistic``, ``reference`` (the null
            distribution), ``p_value``, ``feature_needed`` (p < LRT_LEVEL).
        chosen: the chosen DetectorModel (first row of ``table``).
        fits: {spec: FitResult} of every fitted candidate (Wald intervals, ranking tolerance).
        verdict: one sentence for the datasheet and the terminal.
        skipped: {spec: reason} for candidates the scan cannot identify.
    """

    table: tuple
    tests: tuple
    chosen: DetectorModel
    fits: dict
    verdict: str
    skipped: dict

    def __post_init__(self):
        object.__setattr__(self, "table", tuple(self.table))
        object.__setattr__(self, "tests", tuple(self.tests))

    def rows(self) -> list:
        """The ranking as a list of plain dicts, best first (the datasheet's
        ``model_comparison``)."""
        return [dict(row) for row in self.table]

    def to_dict(self) -> dict:
        """JSON-able: ``candidates`` (:meth:`rows`), ``likelihood_ratio_tests``, ``chosen``
        (spec), ``verdict`` and ``skipped`` (the fits themselves are left out)."""
        return jsonable({
            "candidates": self.rows(),
            "likelihood_ratio_tests": [dict(t) for t in self.tests],
            "chosen": self.chosen.spec,
            "verdict": self.verdict,
            "skipped": dict(self.skipped),
        })

    def to_dataframe(self):
        """pandas DataFrame of :meth:`rows`, one row per candidate (index ``model``), best first."""
        import pandas as pd

        return pd.DataFrame(self.rows()).set_index("model")

    def summary(self, max_rows: int = 12) -> str:
        """Plain-text ranking: model, k, deviance, dof, p, dBIC, dAIC, Akaike weight and
        held-out deviance of the best ``max_rows`` candidates, then the verdict."""
        header, rows = self._table(max_rows)
        return "\n".join([self._title(max_rows), "", text_table(header, rows), ""] + self._notes())

    def _repr_html_(self) -> str:
        return html_block(self._title(12), self._notes(), [html_table(*self._table(12))])

    def _title(self, max_rows: int) -> str:
        shown = min(max_rows, len(self.table))
        cut = f", best {shown} shown" if shown < len(self.table) else ""
        return f"Model ranking: {len(self.table)} candidates fitted{cut}; chosen {self.chosen.spec}"

    def _table(self, max_rows: int):
        header = ["model", "k", "deviance", "dof", "p", "dBIC", "dAIC", "weight", "cv"]
        rows = [[
            row["model"], row["parameters"], f"{row['deviance']:.2f}", row["dof"], format_number(row["p_value"], 3),
            f"{row['delta_bic']:.2f}", f"{row['delta_aic']:.2f}", format_number(row["weight"], 3),
            "" if row["cv_deviance"] is None else f"{row['cv_deviance']:.2f}",
        ] for row in self.table[:max_rows]]
        return header, rows

    def _notes(self) -> list[str]:
        notes = []
        unconverged = [r["model"] for r in self.table if not r["converged"]]
        if unconverged:
            notes.append(f"optimiser not converged: {', '.join(unconverged)}")
        notes.append(f"p: goodness of fit (candidates with p < {ADEQUACY_LEVEL} are inadequate); "
                     "dBIC, dAIC: to the lowest; weight: Akaike weight; cv: held-out-probe deviance")
        if self.skipped:
            notes.append(f"skipped (not identifiable from this scan): {', '.join(self.skipped)}")
        notes.append(self.verdict)
        return notes


def shared_compute_model(model: DetectorModel) -> DetectorModel:
    """The model whose compiled code fits ``model`` in a ranking: the family's largest model
    (``candidates.family_compute_model``) with ``model``'s fixed readout, if it has one (which
    replaces the readout feature)."""
    largest = family_compute_model(model)
    if model.fixed_readout is None:
        return largest
    features = tuple(f for f in largest.features if f != "readout")
    return DetectorModel(largest.family, largest.size, features, largest.saturation, model.fixed_readout)


def attach_fixed_readout(models, matrix) -> list[DetectorModel]:
    """``models`` with the readout matrix ``matrix`` put after each one that has neither the
    ``readout`` feature nor a fixed readout already (unchanged when ``matrix`` is None)."""
    if matrix is None:
        return list(models)
    out = []
    for model in models:
        if "readout" in model.features or model.fixed_readout is not None:
            out.append(model)
            continue
        try:
            out.append(model.with_fixed_readout(matrix))
        except ValueError as error:
            raise ArgumentError(f"candidates: {model.spec} with the fixed readout: {error}") from None
    return out


def _candidate(candidate) -> DetectorModel:
    if isinstance(candidate, DetectorModel):
        return candidate
    try:
        return parse_model_spec(candidate)
    except (ValueError, TypeError) as error:
        raise ArgumentError(f"candidates: {candidate!r}: {error}") from None


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
    compute = shared_compute_model(model)
    nested = [f for f in fits.values() if f.model.family == model.family and f.model.saturation == model.saturation
              and f.model.fixed_readout == model.fixed_readout and set(f.model.features) < set(model.features)]
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
    progress=None,
    fixed_readout=None,
) -> Comparison:
    """Fit every candidate and rank them (see the module docstring).

    Args:
        scan: a validated Scan.
        candidates: DetectorModels or spec strings (default: ``candidate_models(scan.n_outcomes)``).
        calibration_uncertainty: relative 1-sigma probe calibration width, or None.
        cv_folds: folds of the held-out-probe cross-validation (0: none).
        cv_top: at most this many leading candidates are cross-validated.
        seed: seed of the fold assignment.
        progress: optional ``progress(task, done, total)`` called with task "model ranking"
            before the first fit and after each; nothing is printed.
        fixed_readout: None, or a readout matrix M[k, m] (rows: the scan's outcomes) put after
            the candidates without the readout feature (see the module docstring).

    Raises:
        ArgumentError: a candidate spec or an option is invalid (the message names it).
        NotIdentifiable: the scan identifies none of the candidates.
    """
    for name, value in (("cv_folds", cv_folds), ("cv_top", cv_top)):
        if isinstance(value, bool) or int(value) != value or value < 0 or (name == "cv_folds" and value == 1):
            raise ArgumentError(f"{name}: expected 0 or a whole number >= {2 if name == 'cv_folds' else 1}, got {value!r}")
    if candidates is None:
        candidates = candidate_models(scan.n_outcomes)
    candidates = attach_fixed_readout([_candidate(c) for c in candidates], fixed_readout)
    if not candidates:
        raise NotIdentifiable(f"{scan.source}: no candidate model fits a scan with {scan.n_outcomes} outcomes")
    fits, skipped = {}, {}
    ordered = ranking_order(candidates)
    compile_programs([shared_compute_model(m) for m in ordered], fit_cutoff(scan, calibration_uncertainty), progress)
    if progress is not None:
        progress("model ranking", 0, len(ordered))
    for i, model in enumerate(ordered):
        try:
            with warnings.catch_warnings():
                warnings.simplefilter("ignore", FitNotConverged)
                fits[model.spec] = _fit_with_nested_start(scan, model, fits, calibration_uncertainty)
        except (NotIdentifiable, FitError) as error:  # this candidate is left out of the ranking
            skipped[model.spec] = str(error)
        if progress is not None:
            progress("model ranking", i + 1, len(ordered))
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
        row["cv_deviance"] = _cross_validation(scan, fit, shared_compute_model(fit.model), cv_folds, seed,
                                               calibration_uncertainty)

    tests = []
    by_features = {(f.model.family, f.model.features, f.model.fixed_readout): f for f in fits.values()}
    for (family, features, fixed), big in by_features.items():
        for feature in features:
            smaller = tuple(x for x in features if x != feature)
            small = by_features.get((family, smaller, fixed))
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
            f"p = {format_p_value(chosen_row['p_value'])}; the detector needs a model povmfit does not have."
        )
    needed = [t["feature"] for t in tests if t["alternative"] == chosen.spec and t["feature_needed"]]
    alternatives = [r for r in rows[1:] if r["adequate"]]
    margin = f"; next best {alternatives[0]['model']} at delta BIC {alternatives[0]['bic'] - chosen_row['bic']:.1f}" if alternatives else ""
    features = ", ".join(needed) if needed else "no extra features"
    return (
        f"{chosen.spec} explains the data (goodness-of-fit p = {format_p_value(chosen_row['p_value'])}, lowest BIC "
        f"among adequate models{margin}); likelihood-ratio tests require {features}."
    )
