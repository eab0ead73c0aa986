"""Matplotlib figures of the fit report (Agg backend, no display needed).

Every function takes plain arrays and returns a ``matplotlib.figure.Figure``; the data are
prepared in ``report``. :func:`figure_bytes` renders a figure as PNG or SVG bytes with
fixed metadata, so the same data give the same files.

Conventions: photon numbers are mean photons per shot at the reference plane; ``alpha`` is
the complex amplitude of the displacement, plotted along ``Re(alpha)`` (the quadrature is
q = sqrt(2) Re(alpha)); outcome k is drawn in colour ``outcome_colour(k)`` in every figure.
"""
from __future__ import annotations

import io
import math

import matplotlib

matplotlib.use("Agg")

import matplotlib.pyplot as plt  # noqa: E402
import numpy as np  # noqa: E402
from matplotlib.figure import Figure  # noqa: E402

__all__ = [
    "outcome_colour", "figure_bytes", "outcome_probabilities_figure", "residuals_figure",
    "povm_figure", "wigner_figure",
]

_MARKERS = ("o", "s", "^", "D", "v", "P", "X", "*")
_LINESTYLES = ("-", "--", ":", "-.")
_SVG_METADATA = {"Date": None, "Creator": None}


def outcome_colour(k: int):
    """Colour of outcome k (tab10, then tab20 beyond ten outcomes)."""
    cmap = plt.get_cmap("tab10" if k < 10 else "tab20")
    return cmap(k % cmap.N)


def figure_bytes(fig: Figure, fmt: str) -> bytes:
    """Render ``fig`` as ``"png"`` (120 dpi) or ``"svg"`` bytes with fixed metadata."""
    buffer = io.BytesIO()
    if fmt == "svg":
        with matplotlib.rc_context({"svg.hashsalt": "povmfit", "svg.fonttype": "none"}):
            fig.savefig(buffer, format="svg", metadata=_SVG_METADATA)
    elif fmt == "png":
        fig.savefig(buffer, format="png", dpi=120, metadata={"Software": None})
    else:
        raise ValueError(f"unknown figure format {fmt!r}; expected 'png' or 'svg'")
    return buffer.getvalue()


def _panel_grid(n_panels: int, width: float = 4.0, height: float = 3.0):
    columns = min(3, n_panels)
    rows = math.ceil(n_panels / columns)
    fig = Figure(figsize=(width * columns, height * rows), layout="constrained")
    axes = fig.subplots(rows, columns, squeeze=False).ravel()
    for extra in axes[n_panels:]:
        extra.set_visible(False)
    return fig, axes[:n_panels]


def _photon_axis(ax, values) -> None:
    positive = np.asarray(values)[np.asarray(values) > 0]
    if positive.size and positive.max() / positive.min() > 20:
        ax.set_xscale("symlog", linthresh=float(positive.min()), linscale=0.5)


def outcome_probabilities_figure(probes: dict, curves: list[dict], n_outcomes: int) -> Figure:
    """Observed outcome frequencies against probe mean photon number, with model curves.

    Args:
        probes: ``mean_photons`` (n_probes,) coherent + thermal photons; ``thermal_level``
            (n_probes,) int index into ``levels``; ``levels`` (n_levels,) thermal photons;
            ``frequency``, ``lower``, ``upper`` (n_probes, n_outcomes) observed frequency and
            its 1-sigma interval.
        curves: one dict per drawn thermal level: ``level`` (index), ``mean_photons``
            (n_grid,) and ``probability`` (n_grid, n_outcomes) of the fitted model.
    """
    fig = Figure(figsize=(9.0, 5.5), layout="constrained")
    ax = fig.subplots()
    levels = probes["levels"]
    for j, thermal in enumerate(levels):
        rows = probes["thermal_level"] == j
        marker = _MARKERS[j % len(_MARKERS)]
        hollow = j > 0
        for k in range(n_outcomes):
            f = probes["frequency"][rows, k]
            err = np.vstack([f - probes["lower"][rows, k], probes["upper"][rows, k] - f])
            ax.errorbar(
                probes["mean_photons"][rows], f, yerr=err, fmt=marker, ms=4.5, capsize=2, lw=0.8,
                color=outcome_colour(k), mfc="white" if hollow else outcome_colour(k),
                label=f"outcome {k}" if j == 0 else None,
            )
    for curve in curves:
        style = _LINESTYLES[curve["level"] % len(_LINESTYLES)]
        for k in range(n_outcomes):
            ax.plot(curve["mean_photons"], curve["probability"][:, k], style, lw=1.2, color=outcome_colour(k))
    for j, thermal in enumerate(levels):  # legend entries for the thermal levels
        name = "coherent probes" if thermal == 0 else f"thermal part {thermal:.3g} photons"
        ax.plot([], [], color="0.3", ls=_LINESTYLES[j % len(_LINESTYLES)],
                marker=_MARKERS[j % len(_MARKERS)], mfc="white" if j > 0 else "0.3", label=name)
    _photon_axis(ax, probes["mean_photons"])
    ax.set_xlabel("probe mean photon number (coherent + thermal, photons per shot)")
    ax.set_ylabel("outcome probability")
    ax.set_ylim(-0.02, 1.02)
    ax.grid(alpha=0.3)
    ax.legend(fontsize=8, ncol=2, loc="best")
    return fig


def residuals_figure(mean_photons, residuals, labels=None) -> Figure:
    """Standardised residuals (observed - expected) / sd per probe and outcome.

    Args:
        mean_photons: (n_probes,) probe mean photon numbers, used to order the probes.
        residuals: (n_probes, n_outcomes) standardised residuals.
        labels: optional probe labels for the x ticks.
    """
    residuals = np.asarray(residuals)
    order = np.argsort(mean_photons, kind="stable")
    n_probes, n_outcomes = residuals.shape
    fig = Figure(figsize=(9.0, 4.0), layout="constrained")
    ax = fig.subplots()
    position = np.arange(n_probes)
    width = 0.8 / n_outcomes
    for k in range(n_outcomes):
        ax.bar(position + (k - (n_outcomes - 1) / 2) * width, residuals[order, k], width,
               color=outcome_colour(k), label=f"outcome {k}")
    for level in (-2, 2):
        ax.axhline(level, color="0.4", lw=0.8, ls="--")
    ax.axhline(0, color="black", lw=0.8)
    step = max(1, n_probes // 25)
    ticks = position[::step]
    names = [labels[i] for i in order] if labels else [f"{mean_photons[i]:.3g}" for i in order]
    ax.set_xticks(ticks, [names[i] for i in ticks], rotation=60, fontsize=7)
    ax.set_xlabel("probe (ordered by mean photon number)" + ("" if labels else "; tick = mean photons"))
    ax.set_ylabel("standardised residual")
    ax.legend(fontsize=8, ncol=min(n_outcomes, 6), loc="upper left")
    ax.grid(alpha=0.3, axis="y")
    return fig


def povm_figure(model_theta, model_stderr, reconstruction_theta, reconstruction_stderr, constrained) -> Figure:
    """Parametric and model-free POVM elements against photon number, one panel per outcome.

    Only photon numbers where ``constrained`` is True (the probes inform them) are drawn.
    Arrays have shape (n_outcomes, n_photons); ``constrained`` (n_photons,) bool.
    """
    photons = np.flatnonzero(constrained)
    n_outcomes = model_theta.shape[0]
    fig, axes = _panel_grid(n_outcomes)
    for k, ax in enumerate(axes):
        colour = outcome_colour(k)
        model, se = model_theta[k, photons], model_stderr[k, photons]
        ax.plot(photons, model, "-", color=colour, lw=1.4, label="model")
        ax.fill_between(photons, model - 1.96 * se, model + 1.96 * se, color=colour, alpha=0.25, lw=0)
        ax.errorbar(photons, reconstruction_theta[k, photons], yerr=reconstruction_stderr[k, photons],
                    fmt="o", ms=3.5, color="black", mfc="white", capsize=2, lw=0.8, label="model-free")
        ax.set_title(f"outcome {k}", fontsize=10)
        ax.set_xlabel("photon number n")
        ax.set_ylabel(f"P({k} | n)")
        ax.set_ylim(-0.05, 1.05)
        ax.grid(alpha=0.3)
    axes[0].legend(fontsize=8)
    return fig


def wigner_figure(re_alpha, model_values, points: list[dict], smoothed: list[dict]) -> Figure:
    """Wigner functions of the POVM elements along the real axis, one panel per outcome.

    Args:
        re_alpha: (n_grid,) Re(alpha) of the model curve (Im(alpha) = 0).
        model_values: (n_outcomes, n_grid) model Wigner values (units 1/area in alpha).
        points: per outcome, dict ``re_alpha``, ``value``, ``stderr`` arrays (pointwise values).
        smoothed: per outcome, dict ``re_alpha``, ``value`` arrays (may be empty).
    """
    n_outcomes = model_values.shape[0]
    fig, axes = _panel_grid(n_outcomes)
    for k, ax in enumerate(axes):
        colour = outcome_colour(k)
        ax.plot(re_alpha, model_values[k], "-", color=colour, lw=1.4, label="model")
        if k < len(smoothed) and len(smoothed[k]["re_alpha"]):
            order = np.argsort(smoothed[k]["re_alpha"])
            ax.plot(smoothed[k]["re_alpha"][order], smoothed[k]["value"][order], "--", color="0.25", lw=1.1, label="smoothed")
        if k < len(points) and len(points[k]["re_alpha"]):
            ax.errorbar(points[k]["re_alpha"], points[k]["value"], yerr=points[k]["stderr"], fmt="o", ms=3.5,
                        color="black", mfc="white", capsize=2, lw=0.8, label="pointwise")
        ax.axhline(0, color="0.5", lw=0.6)
        ax.set_title(f"outcome {k}", fontsize=10)
        ax.set_xlabel("Re(alpha)  [Im(alpha) = 0]")
        ax.set_ylabel("W(alpha)")
        ax.grid(alpha=0.3)
    axes[0].legend(fontsize=8)
    return fig
