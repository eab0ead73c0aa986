"""``povmfit batch`` on a real Dask cluster (two worker processes) with simulated sweeps.

The sweep: an 8-pixel click array (``array:8+dark``) whose efficiency follows a sigmoid in
the bias current, eta(I) = ETA_MAX / (1 + exp(-(I - I_HALF)/WIDTH)), and whose per-pixel
dark probability rises exponentially, d(I) = D_LOW exp((I - I_LOW)/D_SCALE). Counts are
multinomial draws from the exact outcome probabilities (``tests/simulated.py``).
"""
from __future__ import annotations

import json
import math
import sys
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

sys.path.insert(0, str(Path(__file__).resolve().parent))

from simulated import exact_probabilities, simulated_counts  # noqa: E402

import povmfit  # noqa: E402
from povmfit.fitting.cli.main import main  # noqa: E402
from povmfit.fitting.data.scan import write_scan  # noqa: E402
from povmfit.models import parse_model_spec  # noqa: E402

MODEL = "array:8+dark"
ETA_MAX, I_HALF, WIDTH = 0.85, 7.0, 0.4  # sigmoid efficiency, bias in microampere
D_LOW, I_LOW, D_SCALE = 1e-4, 6.0, 1.0  # per-pixel dark probability, e-fold per microampere
BIAS = (6.0, 7.5, 8.5, 9.0, 10.0)  # the quick sweep of the default run
LONG_BIAS = (6.0, 6.5, 7.0, 7.5, 8.0, 8.5, 9.0, 9.5, 10.0)
COHERENT = (0.0, 0.0, 0.3, 1.0, 2.0, 4.0)  # mean photons per shot; two dark probes
SHOTS = 20_000
DARK_LIMIT = 0.01


def efficiency_at(bias):
    return ETA_MAX / (1.0 + np.exp(-(np.asarray(bias, float) - I_HALF) / WIDTH))


def dark_at(bias):
    return D_LOW * np.exp((np.asarray(bias, float) - I_LOW) / D_SCALE)


def write_bias_sweep(folder: Path, bias=BIAS, seed: int = 7, shots: int = SHOTS, coherent=COHERENT,
                     prefix: str = "bias") -> list[Path]:
    """One simulated scan file per bias value in ``folder``; returns their paths."""
    model = parse_model_spec(MODEL)
    rng = np.random.default_rng(seed)
    coherent = np.asarray(coherent, float)
    thermal = np.zeros_like(coherent)
    paths = []
    for current in bias:
        truth = {"efficiency": float(efficiency_at(current)), "dark_probability": float(dark_at(current))}
        counts = simulated_counts(exact_probabilities(model, truth, coherent, thermal), shots, rng)
        path = folder / f"{prefix}_{current:.1f}ua.csv"
        write_scan(povmfit.scan_from_arrays(coherent, thermal, counts), path)
        paths.append(path)
    return paths


def write_manifest(folder: Path, paths, bias=BIAS, extra: dict | None = None) -> Path:
    names = [p.name if p.parent == folder else str(p) for p in paths]
    frame = pd.DataFrame({"scan": names, "bias_current_ua": list(bias), **(extra or {})})
    path = folder / "manifest.csv"
    frame.to_csv(path, index=False)
    return path


@pytest.fixture(scope="module")
def cluster():
    """A real dask.distributed.LocalCluster: two worker processes, one thread each (the
    batch's own constructor, which keeps this process's numerical-library threads)."""
    pytest.importorskip("dask.distributed")
    from povmfit.fitting.workflow.batch import local_cluster

    with local_cluster(2) as local:
        assert len(local.workers) == 2
        yield local.scheduler_address


@pytest.fixture(scope="module")
def sweep(cluster, tmp_path_factory):
    folder = tmp_path_factory.mktemp("sweep")
    paths = write_bias_sweep(folder)
    # a sidecar on the first scan: its well-known keys become columns of the figures table
    paths[0].with_name(paths[0].name + ".meta.json").write_text(json.dumps({"device": "WN-8", "temperature_k": 2.4}))
    manifest = write_manifest(folder, paths)
    out = folder / "results"
    result = povmfit.characterise_many(manifest, out, model=MODEL, dark_limit=DARK_LIMIT, scheduler=cluster)
    return result, out, paths


def test_sweep_recovers_every_scans_truth(sweep):
    result, out, _ = sweep
    frame = result.to_dataframe()
    assert list(frame["status"]) == ["ok"] * len(BIAS), list(frame["reason"])
    assert list(frame["model"]) == [MODEL] * len(BIAS)
    for row in frame.to_dict("records"):
        eta = efficiency_at(row["bias_current_ua"])
        p_vac = 1 - (1 - dark_at(row["bias_current_ua"])) ** 8  # no click on 8 silent pixels (independent Bernoulli)
        # shot noise only: 4 standard errors, false-failure probability about 6e-5 per figure (normal tails)
        assert abs(row["efficiency_value"] - eta) < 4 * row["efficiency_stderr"]
        assert abs(row["vacuum_click_probability_value"] - p_vac) < 4 * row["vacuum_click_probability_stderr"]
        assert row["efficiency_ci95_lo"] < row["efficiency_value"] < row["efficiency_ci95_hi"]
        assert (out / row["output"] / "datasheet.json").is_file() and (out / row["output"] / "report.html").is_file()


def check_sweep_figures(group, bias):
    assert group["bias_column"] == "bias_current_ua" and group["scans"] == len(bias)
    # closed form of the sigmoid: eta(I) >= 0.99 max_sweep eta  <=>  I >= I_HALF + WIDTH ln(r/(1-r)),
    # r = 0.99 eta(I_last)/ETA_MAX; linear interpolation between the points around 8.8 uA adds
    # 0.065 uA (noise-free value, test_batch_sweeps.py checks the interpolation), against ~0.15 uA of shot noise
    r = 0.99 * efficiency_at(bias[-1]) / ETA_MAX
    start_truth = I_HALF + WIDTH * math.log(r / (1 - r))
    start = group["start"]
    # estimate within 3 of its standard errors plus the interpolation error (false failure < 0.3 %, normal)
    assert abs(start["value"] - start_truth) < 3 * start["stderr"] + 0.065
    assert 0.01 < start["stderr"] < 0.5
    assert group["end"]["open"] and group["end"]["value"] == bias[-1]  # still on the plateau at 10 uA
    # dark limit: 1 - (1 - d)^8 = 0.01 at d = 1 - 0.99^(1/8); d(I) exponential -> closed form
    crossing_truth = I_LOW + D_SCALE * math.log((1 - (1 - DARK_LIMIT) ** (1 / 8)) / D_LOW)
    crossing = group["dark_limit_bias"]
    assert abs(crossing["value"] - crossing_truth) < 3 * crossing["stderr"]  # false failure < 0.3 %


def test_sweep_finds_the_plateau_and_the_dark_limit_within_their_uncertainty(sweep):
    result, out, _ = sweep
    (group,) = result.sweeps
    check_sweep_figures(group, BIAS)
    sweeps = pd.read_csv(out / "sweeps.csv")
    assert sweeps.loc[0, "plateau_start_value"] == pytest.approx(group["start"]["value"])
    assert sweeps.loc[0, "dark_limit_bias_value"] == pytest.approx(group["dark_limit_bias"]["value"])


def test_figures_files_and_report(sweep):
    result, out, _ = sweep
    csv = pd.read_csv(out / "figures.csv")
    parquet = pd.read_parquet(out / "figures.parquet")
    for frame in (csv, parquet):
        for column in ("scan", "bias_current_ua", "status", "reason", "model", "gof_p_value", "cross_check",
                       "efficiency_value", "efficiency_stderr", "efficiency_ci95_lo", "efficiency_ci95_hi",
                       "vacuum_click_probability_value", "vacuum_click_probability_ci95_hi"):
            assert column in frame.columns, column
        assert len(frame) == len(BIAS)
        assert frame.loc[0, "device"] == "WN-8" and frame.loc[0, "temperature_k"] == 2.4
        assert frame["temperature_k"][1:].isna().all()  # the other scans have no sidecar
    assert parquet["efficiency_value"].tolist() == pytest.approx(csv["efficiency_value"].tolist(), rel=1e-12)
    page = (out / "batch_report.html").read_text()
    assert page.count("<svg") >= 1 and "bias_current_ua" in page and "No scan was refused" in page
    assert "scans/bias_6.0ua/report.html" in page
    assert "plateau" in result.summary() and f"{len(BIAS)} ok" in result.summary()
    assert json.loads(json.dumps(result.to_dict(), default=str))["options"]["dark_limit"] == DARK_LIMIT
    assert "<table>" in result._repr_html_()


def test_batch_gives_what_the_fit_command_gives(sweep, tmp_path):
    """Same scan, same options: the batch's folder equals `povmfit fit --out` byte for byte,
    except the creation time in the datasheet. The manifest's bias_current_ua is a well-known
    metadata key, which the batch hands to the scan's job as `--meta` does."""
    result, out, paths = sweep
    row = result.rows[3]
    assert main(["fit", str(paths[3]), "--model", MODEL, "--jobs", "1", "--quiet", "--out", str(tmp_path),
                 "--meta", f"bias_current_ua={BIAS[3]}"]) == 0
    batch_folder = out / row["output"]
    sheets = []
    for folder in (batch_folder, tmp_path):
        sheet = json.loads((folder / "datasheet.json").read_text())
        sheet["provenance"].pop("created_utc")
        sheet["provenance"].pop("input_file")  # the batch gives the resolved path
        sheets.append(sheet)
    assert sheets[0] == sheets[1]
    for name in ("povm.csv", "wigner.csv"):
        assert (batch_folder / name).read_bytes() == (tmp_path / name).read_bytes(), name
    for folder in (batch_folder, tmp_path):
        assert sorted(p.name for p in (folder / "plots").iterdir()) == ["outcome_probabilities.svg", "povm.svg",
                                                                         "residuals.svg", "wigner.svg"]
    detector = [json.loads((f / "detector.json").read_text()) for f in (batch_folder, tmp_path)]
    for record in detector:
        record.get("provenance", {}).pop("input_file", None)
    assert detector[0] == detector[1]


def test_bad_scans_are_reported_and_the_rest_done(cluster, tmp_path, capsys):
    paths = write_bias_sweep(tmp_path, bias=(9.0,), shots=5_000)
    broken = tmp_path / "broken.csv"
    broken.write_text("coherent_photons,thermal_photons,shots,count_0,count_1\n0.5,0,100,60,41\n")
    manifest = tmp_path / "fleet.csv"
    manifest.write_text("scan,channel,bias_current_ua\n"
                        f"{paths[0].name},A,9.0\nbroken.csv,B,8.0\nmissing.csv,C,8.0\n")
    out = tmp_path / "out"
    code = main(["batch", str(manifest), "--model", MODEL, "--scheduler", cluster, "--out", str(out), "--quiet"])
    assert code == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 2 and "broken.csv" in err[0] and "missing.csv" in err[1]
    frame = pd.read_csv(out / "figures.csv", keep_default_na=False)
    assert list(frame["status"]) == ["ok", "refused", "refused"]
    assert "broken.csv:2: column shots: counts sum to 101" in frame.loc[1, "reason"]  # the scan loader's one line
    assert "cannot read" in frame.loc[2, "reason"]
    assert (out / "scans" / paths[0].stem / "datasheet.json").is_file()
    assert not (out / "scans" / "broken").exists() and frame.loc[1, "output"] == ""
    page = (out / "batch_report.html").read_text()
    assert "Refused scans" in page and "missing.csv" in page
    # channel A has one ok scan: too few for sweep figures, and the sweep table says so
    assert "fewer than two scans" in pd.read_csv(out / "sweeps.csv", keep_default_na=False).loc[0, "note"]


@pytest.mark.slow
def test_long_sweep_on_a_cluster_the_batch_starts_itself(tmp_path):
    """The default scheduler (a LocalCluster started and stopped by the batch), nine bias points."""
    paths = write_bias_sweep(tmp_path, bias=LONG_BIAS, seed=21, shots=50_000, coherent=(0.0, 0.0, 0.3, 1.0, 2.0, 4.0, 8.0))
    manifest = write_manifest(tmp_path, paths, bias=LONG_BIAS)
    result = povmfit.characterise_many(manifest, tmp_path / "out", model=MODEL, dark_limit=DARK_LIMIT, workers=2)
    assert result.count("ok") == len(LONG_BIAS)
    check_sweep_figures(result.sweeps[0], LONG_BIAS)


@pytest.mark.slow
def test_dask_multiprocessing_scheduler_gives_the_same_figures(sweep, tmp_path):
    result, _, paths = sweep
    manifest = write_manifest(tmp_path, paths[:2], bias=BIAS[:2])
    again = povmfit.characterise_many(manifest, None, model=MODEL, scheduler="processes", workers=2)
    for row, before in zip(again.rows, result.rows):
        assert row["efficiency_value"] == before["efficiency_value"]  # same functions, same seeds
