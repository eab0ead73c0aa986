"""The result of a fit (:class:`FitResult`): frozen, documented field by field, with plain-text,
notebook, table, JSON, lmfit and detector-file views of the same numbers."""
from __future__ import annotations

import math
from dataclasses import dataclass, field, fields

import numpy as np

from povmfit.models import DetectorModel, null_value

from povmfit.fitting.data.detector_file import DetectorRecord
from povmfit.fitting.display import format_number, format_uncertain, html_block, html_table, text_table
from povmfit.fitting.inference.objective import povm_and_jacobian

__all__ = ["FitResult", "FitNotConverged", "jsonable"]

_ARRAY_FIELDS = ("covariance", "stat_covariance", "correlation", "predicted")


class FitNotConverged(UserWarning):
    """The optimiser stopped without meeting its convergence criteria."""


@dataclass(frozen=True)
class FitResult:
    """Result of ``fit_scan``: a maximum-likelihood fit of one detector model to one scan.

    Frozen: no field can be reassigned and the arrays are read-only; a bootstrap is asked
    for in ``fit_scan(..., bootstrap=N, seed=S)``, not added afterwards.

    Attributes:
        model: the fitted DetectorModel. With a fixed readout matrix M
            (``model.fixed_readout``) every POVM here (``povm_and_jacobian``,
            ``povm_with_errors``, the figures, ``predicted``, the detector file) is the
            observed one, M @ theta_registered.
        names: fitted parameter names: the model's parameters in its order, then
            ``probe_scale`` when a calibration prior was given.
        values: {name: estimate}.
        stderr: {name: standard error} from the inverse Fisher information, statistical and
            calibration parts combined.
        stat_stderr: {name: statistical part} (the probe scale held at its estimate);
            0 for ``probe_scale``.
        calibration_stderr: {name: calibration part}, sqrt(stderr^2 - stat_stderr^2); 0 for
            every parameter when the probes are taken as exact.
        ci95: {name: (lo, hi)} 95 % interval.
        ci_method: {name: "wald" | "profile"}: estimate +- 1.96 stderr, or the
            profile-likelihood interval (deviance rise 3.841) where the Wald interval would
            cross a bound of the parameter.
        covariance: combined covariance over ``names``, shape (P, P).
        stat_covariance: statistical covariance over the model parameters, shape (M, M).
        correlation: correlation matrix over ``names``, shape (P, P).
        deviance: multinomial deviance of the counts at the optimum (without the prior term).
        dof: degrees of freedom, fitted probes x (outcomes - 1) - model parameters.
        p_value: goodness of fit, P(chi2_dof > deviance); NaN when dof <= 0.
        n_photons: photon-number cutoff of the fit.
        predicted: q[p, k] at the optimum for every probe of the scan, shape
            (n_probes, n_outcomes).
        converged: the optimiser met a convergence criterion.
        message: the optimiser's message.
        calibration_uncertainty: relative 1-sigma probe-calibration width, or None (probes
            taken as exact).
        weighting: "deviance" (maximum likelihood) or "pearson".
        bounds: {name: (lo, hi)} of every fitted parameter, as the optimiser used them.
        compute_model: the model whose compiled code computed the fit (``model`` itself or a
            larger model of its family with the missing features switched off).
        bootstrap: None, or the parametric bootstrap as a JSON-able dict: ``resamples``,
            ``seed``, ``converged`` (refits that met a convergence criterion; the statistics
            use those), ``stderr`` {name: sd of the refits}, ``ci95`` {name: [2.5 %, 97.5 %]
            percentiles}.
    """

    model: DetectorModel
    names: tuple[str, ...]
    values: dict
    stderr: dict
    stat_stderr: dict
    calibration_stderr: dict
    ci95: dict
    ci_method: dict
    covariance: np.ndarray
    stat_covariance: np.ndarray
    correlation: np.ndarray
    deviance: float
    dof: int
    p_value: float
    n_photons: int
    predicted: np.ndarray
    converged: bool
    message: str
    calibration_uncertainty: float | None
    weighting: str
    bounds: dict
    compute_model: DetectorModel | None = None
    bootstrap: dict | None = field(default=None)

    def __post_init__(self):
        for name in _ARRAY_FIELDS:  # read-only copies: the result cannot change under its reader
            array = np.array(getattr(self, name), dtype=float)
            array.setflags(write=False)
            object.__setattr__(self, name, array)

    # ----- derived quantities ----------------------------------------------------------
    @property
    def parameter_vector(self) -> np.ndarray:
        """Model parameter values in ``model.parameter_names`` order."""
        return np.array([self.values[n] for n in self.model.parameter_names])

    def povm_and_jacobian(self, n_photons: int):
        """Fitted POVM theta[k, n] and d theta / d (model parameters), shapes (K, N) and
        (K, N, M), from the compiled code the fit used."""
        compute = self.compute_model or self.model
        names = list(compute.parameter_names)
        full = np.array([self.values[n] if n in self.values else null_value(n) for n in names])
        theta, jac = povm_and_jacobian(compute, n_photons)(full)
        own = [names.index(n) for n in self.model.parameter_names]
        return np.asarray(theta), np.asarray(jac)[..., own]

    def figures(self, gate_duration_s: float | None = None) -> dict:
        """The datasheet figures (efficiency, vacuum click probability, dark count rate with a
        gate duration in seconds, crosstalk probability), each {value, stderr, ci95, ...}."""
        from povmfit.fitting.inference.figures import figures

        return figures(self, gate_duration_s)

    def povm_with_errors(self, n_photons: int):
        """Fitted POVM theta[k, n] and its delta-method standard errors (combined covariance
        of the model parameters), both shape (n_outcomes, n_photons)."""
        theta, jac = self.povm_and_jacobian(n_photons)
        n_model = len(self.model.parameter_names)
        var = np.einsum("kni,ij,knj->kn", jac, self.covariance[:n_model, :n_model], jac)
        return theta, np.sqrt(np.clip(var, 0, None))

    def to_detector(self, gate_duration_s: float | None = None, provenance: dict | None = None) -> DetectorRecord:
        """The fitted detector as a ``DetectorRecord`` (what ``detector.json`` stores):
        model parameters only (no probe scale) and their combined covariance."""
        n_model = len(self.model.parameter_names)
        return DetectorRecord(
            model=self.model,
            parameters={n: self.values[n] for n in self.model.parameter_names},
            covariance=np.array(self.covariance[:n_model, :n_model]),
            gate_duration_s=gate_duration_s,
            provenance=dict(provenance or {}),
            bounds=self.model.bounds(),
        )

    # ----- views -----------------------------------------------------------------------
    def to_dict(self) -> dict:
        """Every field as plain JSON-able data (models as specs, arrays as nested lists,
        non-finite numbers as None)."""
        out = {}
        for f in fields(self):
            value = getattr(self, f.name)
            if isinstance(value, DetectorModel):
                value = value.spec
            out[f.name] = jsonable(value)
        return out

    def to_dataframe(self):
        """pandas DataFrame, one row per fitted parameter (index ``parameter``): value,
        stderr, stat_stderr, calibration_stderr, ci95_lo, ci95_hi, ci_method, and the
        bootstrap stderr and interval when there is a bootstrap."""
        import pandas as pd

        rows = []
        for name in self.names:
            row = {
                "parameter": name, "value": self.values[name], "stderr": self.stderr[name],
                "stat_stderr": self.stat_stderr[name], "calibration_stderr": self.calibration_stderr[name],
                "ci95_lo": self.ci95[name][0], "ci95_hi": self.ci95[name][1], "ci_method": self.ci_method[name],
            }
            if self.bootstrap:
                row["bootstrap_stderr"] = self.bootstrap["stderr"][name]
                row["bootstrap_ci95_lo"], row["bootstrap_ci95_hi"] = self.bootstrap["ci95"][name]
            rows.append(row)
        return pd.DataFrame(rows).set_index("parameter")

    @property
    def params(self):
        """The estimates as ``lmfit.Parameters``: value, bounds, stderr and correlations
        (``.correl``) of every fitted parameter."""
        import lmfit

        params = lmfit.Parameters()
        for i, name in enumerate(self.names):
            lo, hi = self.bounds[name]
            params.add(name, value=self.values[name], min=lo, max=hi)
            params[name].stderr = self.stderr[name]
            params[name].correl = {other: float(self.correlation[i, j]) for j, other in enumerate(self.names) if j != i}
        return params

    def fit_report(self) -> str:
        """lmfit's text report of :attr:`params`."""
        import lmfit

        return lmfit.fit_report(self.params)

    def summary(self) -> str:
        """Plain text for a lab book or an e-mail: the model, every parameter as
        value ± stderr with its statistical and calibration parts and 95 % interval, the
        goodness of fit and the optimiser's status."""
        return "\n".join(self._heading() + [""] + [text_table(*self._table())] + [""] + self._footer())

    def _repr_html_(self) -> str:
        heading = self._heading()
        return html_block(heading[0], heading[1:] + self._footer(), [html_table(*self._table())])

    def _heading(self) -> list[str]:
        model = self.model
        if model.family == "array":
            size = f"{model.size} pixels" + (f", saturating at {model.saturation}" if model.saturation else "")
        elif model.family == "pnr":
            size = f"outcomes 0..{model.max_outcome}"
        else:
            size = "on/off"
        features = ", ".join(model.feature_list) or "none"
        if self.calibration_uncertainty is None:
            calibration = "probes taken as exact: the uncertainties exclude the probe calibration"
        else:
            calibration = (f"probe calibration {self.calibration_uncertainty:.3g} relative (1 sigma), fitted as "
                           "probe_scale; stderr = statistical (+) calibration in quadrature")
        lines = [
            f"Fit of {model.spec} ({model.family}, {size}; features: {features})",
            calibration,
            f"{self.weighting} weighting, photon-number cutoff {self.n_photons}",
        ]
        if model.fixed_readout is not None:
            rows, columns = len(model.fixed_readout), len(model.fixed_readout[0])
            lines.append(f"fixed readout: a known {rows} x {columns} misassignment matrix after the model "
                         "(outcomes x registered numbers)")
        return lines

    def _table(self):
        header = ["parameter", "value ± stderr", "statistical", "calibration", "95 % interval", "method"]
        rows = []
        for name in self.names:
            value, se = self.values[name], self.stderr[name]
            lo, hi = self.ci95[name]
            rows.append([
                name, format_uncertain(value, se), format_number(self.stat_stderr[name], 2),
                format_number(self.calibration_stderr[name], 2),
                f"[{_same_place(lo, se)}, {_same_place(hi, se)}]", self.ci_method[name],
            ])
        return header, rows

    def _footer(self) -> list[str]:
        lines = [
            f"goodness of fit: deviance {self.deviance:.2f} on {self.dof} degrees of freedom, "
            f"p = {format_number(self.p_value, 3)}",
            f"optimiser: {'converged' if self.converged else 'NOT converged'} ({self.message})",
        ]
        if self.bootstrap:
            boot = self.bootstrap
            spreads = ", ".join(f"{n} {format_number(boot['stderr'][n], 2)}" for n in self.names)
            lines.append(f"bootstrap: {boot['resamples']} resamples (seed {boot['seed']}), {boot['converged']} converged; "
                         f"stderr {spreads}")
        return lines


def _same_place(value: float, stderr: float) -> str:
    """``value`` rounded to the decimal place ``format_uncertain`` gives it next to ``stderr``."""
    if not math.isfinite(value) or not math.isfinite(stderr) or stderr <= 0:
        return format_number(float(value), 6)
    place = 1 - math.floor(math.log10(abs(stderr)))
    return f"{value:.{place}f}" if place > 0 else f"{value:.6g}"


def jsonable(value):
    """JSON-able copy: arrays and tuples as lists, numpy scalars as Python numbers, NaN and
    infinities as None."""
    if isinstance(value, dict):
        return {str(k): jsonable(v) for k, v in value.items()}
    if isinstance(value, (list, tuple, np.ndarray)):
        return [jsonable(v) for v in (value.tolist() if isinstance(value, np.ndarray) else value)]
    if isinstance(value, (bool, np.bool_)):
        return bool(value)
    if isinstance(value, (int, np.integer)):
        return int(value)
    if isinstance(value, (float, np.floating)):
        return float(value) if math.isfinite(value) else None
    return value
