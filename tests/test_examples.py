"""The examples run end to end (fixed seeds, small sizes) and print what they promise."""
from __future__ import annotations

import re
import subprocess
import sys
from pathlib import Path

import pytest

EXAMPLES = Path(__file__).resolve().parent.parent / "examples"


def run_example(name: str, *args: str) -> str:
    completed = subprocess.run([sys.executable, str(EXAMPLES / name), *args], capture_output=True, text=True, timeout=300)
    assert completed.returncode == 0, completed.stderr[-2000:]
    return completed.stdout


def figure_row(text: str, name: str) -> list[float]:
    line = next(line for line in text.splitlines() if line.strip().startswith(name))
    return [float(v) for v in re.findall(r"-?\d+\.?\d*(?:e[+-]?\d+)?", line.replace(name, ""))]


def test_characterise_detector_recovers_the_simulated_device():
    out = run_example("characterise_detector.py")
    assert "simulated" in out
    value, stderr, stat, calibration, lo, hi = figure_row(out, "efficiency")
    # the script simulates efficiency 0.72 with exact probes: the estimate must lie within
    # 4 statistical standard errors of it (shot noise only; Monte Carlo in the script)
    assert abs(value - 0.72) < 4 * stat
    assert calibration > stat  # 3 % calibration on 0.72 is 0.022, far above the shot noise
    assert stderr == pytest.approx((stat**2 + calibration**2) ** 0.5, rel=0.1)  # parts add in quadrature
    assert lo < 0.72 < hi
    crosstalk = figure_row(out, "crosstalk_probability")
    assert abs(crosstalk[0] - 0.03) < 4 * crosstalk[1]  # simulated 0.03, shot-noise tolerance
    assert "dark_count_rate_hz" in out


def test_compare_models_chooses_the_simulated_model():
    out = run_example("compare_models.py")
    verdict = next(line for line in out.splitlines() if line.startswith("verdict:"))
    # the simulation has dark clicks and 6 % crosstalk: 20,000-shot probes resolve it easily
    assert "array:4+dark+crosstalk explains the data" in verdict
    for model in ("array:4 ", "array:4+dark ", "array:4+dark+crosstalk "):
        assert any(line.startswith(model) for line in out.splitlines()), model


def test_heralded_source_ensemble_and_monte_carlo_agree():
    out = run_example("heralded_source.py", "--ensemble", "200", "--shots", "100000")
    point, mean, sd = figure_row(out, "heralded g2(0)")
    assert sd > 0 and abs(mean - point) < 3 * sd / 200**0.5 + 1e-9  # ensemble centred on the fit
    herald_point, herald_mean, herald_sd = figure_row(out, "heralding probability")
    # heralding probability of TMSV (mu = 0.1) through a click detector with eta ~ 0.8 and
    # small dark probability: 1 - (1 - d)/(1 + eta mu) ~ 0.074 (closed form for thermal input)
    assert herald_point == pytest.approx(1 - 1 / (1 + 0.8 * 0.1), abs=0.004)
    match = re.search(r"heralding probability ([\d.]+), heralded g2\(0\) ([\d.]+) \(exact .*: ([\d.]+), ([\d.]+)\)", out)
    sampled_rate, sampled_g2, exact_rate, exact_g2 = map(float, match.groups())
    # 100,000 pulses: sd of the rate sqrt(p(1-p)/N) ~ 8e-4, so 4 sd = 3.4e-3
    assert abs(sampled_rate - exact_rate) < 3.4e-3
    # g2 rests on the ~800 heralds with two or more photons: relative sd ~ 1/sqrt(800) ~ 3.5 %; allow 4 sd
    assert sampled_g2 == pytest.approx(exact_g2, rel=0.14)


def test_walkthrough_runs_every_cell_and_recovers_the_demo_device():
    out = run_example("walkthrough.py")
    value, stderr = (float(v) for v in re.search(r"efficiency (\d\.\d+) ± (\d\.\d+) \(statistical only\)", out).groups())
    # the bundled scan simulates efficiency 0.62 (fitting/data/demo.py); shot noise only, 4 sigma
    assert abs(value - 0.62) < 4 * stderr
    assert "cross-check" in out and "outcome counts for coherent:2.0" in out
    assert "datasheet.json" in out and "report.html" in out


def test_bias_sweep_finds_the_simulated_plateau_and_dark_limit():
    out = run_example("bias_sweep.py", "--workers", "2")
    assert "6 ok" in out and "figures.csv" in out and "batch_report.html" in out
    for name in ("plateau start", "dark limit bias"):
        value, stderr, truth = figure_row(out, name)
        # the script's truth is the closed form of its sigmoid / exponential device; shot noise
        # only, 3 standard errors (false failure < 0.3 % each, normal approximation)
        assert abs(value - truth) < 3 * stderr, name


def test_tally_pulse_heights_example_recovers_the_simulated_sensor():
    out = run_example("tally_pulse_heights.py")
    assert "wrote scan" in out and "wrote readout" in out
    for name in ("tally efficiency", "fit efficiency"):
        value, stderr, truth = figure_row(out, name)
        # the script simulates efficiency 0.81 by Monte Carlo (Poisson photons of a Gaussian
        # mixture of coherent states, binomial loss); shot noise only, 4 standard errors
        # (false failure 6e-5 each, normal approximation)
        assert truth == 0.81 and abs(value - truth) < 4 * stderr, name
