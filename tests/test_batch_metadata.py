"""Measurement metadata in a batch: the well-known keys of every scan (from its sidecar and from
the manifest's columns) become columns of figures.csv/.parquet, cells of the report's scan
table and of sweeps.csv, and reach each scan's datasheet; bad manifest cells are refused
before any work.

The scans are simulated from an on/off detector (``threshold+dark``, multinomial draws from
the exact probabilities, ``tests/simulated.py``). The batch here runs its scans in this process
(the Dask scheduling is swapped for a loop over the same ``run_scan`` task), so the two fits
compile once; ``test_batch.py`` runs the same task on a real cluster. Every expected value is
the metadata contract of the README (common practice, no source): no physics is checked here.
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
from povmfit.fitting.data.errors import InputFileError  # noqa: E402
from povmfit.fitting.data.scan import write_scan  # noqa: E402
from povmfit.fitting.workflow import batch  # noqa: E402
from povmfit.models import parse_model_spec  # noqa: E402

MODEL = "threshold+dark"
COHERENT = (0.0, 0.5, 1.0, 2.0, 4.0)  # mean photons per shot


def write_on_off_scan(path: Path, efficiency: float, rng, coherent=COHERENT) -> Path:
    coherent = np.asarray(coherent, float)
    thermal = np.zeros_like(coherent)
    q = exact_probabilities(parse_model_spec(MODEL), {"efficiency": efficiency, "dark_probability": 0.01},
                            coherent, thermal)
    write_scan(povmfit.scan_from_arrays(coherent, thermal, simulated_counts(q, 5000, rng)), path)
    return path


def write_sidecar(scan: Path, meta: dict) -> None:
    scan.with_name(scan.name + ".meta.json").write_text(json.dumps(meta))


def run_in_this_process(jobs, workers, progress):
    """The batch's task on every job in turn (stands in for Dask's process pool)."""
    return [batch.run_scan(job) for job in jobs]


@pytest.fixture(scope="module")
def fleet(tmp_path_factory):
    folder = tmp_path_factory.mktemp("fleet")
    rng = np.random.default_rng(3)
    a = write_on_off_scan(folder / "a.csv", 0.6, rng)
    b = write_on_off_scan(folder / "b.csv", 0.7, rng)
    lone = write_on_off_scan(folder / "lone.csv", 0.7, rng, coherent=(1.0,))  # one probe: refused
    broken = write_on_off_scan(folder / "broken.csv", 0.7, rng)
    write_sidecar(a, {"device": "WN-8", "serial": "0042", "temperature_k": 2.5, "wavelength_nm": 1550,
                      "lab_room": "B12"})
    write_sidecar(b, {"device": "WN-8", "temperature_k": 3.0})
    write_sidecar(lone, {"device": "WN-9"})
    broken.with_name("broken.csv.meta.json").write_text("{not json")
    manifest = folder / "fleet.csv"
    manifest.write_text("scan,bias_current_ua,wavelength_nm\n"
                        "a.csv,8.0,1310\nb.csv,9.0,1310\nlone.csv,9.5,1310\nbroken.csv,10.0,1310\n")
    out = folder / "out"
    with pytest.MonkeyPatch.context() as patch:
        patch.setattr(batch, "_run_processes", run_in_this_process)
        result = povmfit.characterise_many(manifest, out, model=MODEL, scheduler="processes", workers=1)
    return result, out


def test_figures_table_has_a_column_per_sidecar_key_after_the_conditions(fleet):
    result, out = fleet
    text = {"device": str, "serial": str}  # read as text, as the keys are (CSV does not say)
    csv = pd.read_csv(out / "figures.csv", dtype=text, keep_default_na=False, na_values={"temperature_k": [""]})
    for frame in (csv, pd.read_parquet(out / "figures.parquet")):
        # conditions first (two of them well-known keys), then the sidecars' well-known keys in
        # the order of data.metadata.KNOWN_KEYS; "lab_room" is not well known and stays out
        assert list(frame.columns[:7]) == ["scan", "bias_current_ua", "wavelength_nm", "device", "serial",
                                           "temperature_k", "status"]
        assert list(frame["status"]) == ["ok", "ok", "refused", "refused"], list(frame["reason"])
        assert list(frame["device"]) == ["WN-8", "WN-8", "WN-9", ""]  # empty text where a scan has none
        assert list(frame["serial"]) == ["0042", "", "", ""]  # text keeps its leading zeros
        assert frame["temperature_k"].tolist()[:2] == [2.5, 3.0] and frame["temperature_k"][2:].isna().all()
        assert frame["wavelength_nm"].tolist() == [1310.0] * 4  # the manifest's column, not a's sidecar
    assert batch.metadata_columns(result.manifest, result.rows) == ["device", "serial", "temperature_k"]
    assert result.to_dict()["metadata_columns"] == ["device", "serial", "temperature_k"]


def test_a_refused_scan_keeps_its_metadata_and_a_bad_sidecar_is_its_reason(fleet):
    result, _ = fleet
    lone, broken = result.rows[2], result.rows[3]
    assert lone["device"] == "WN-9" and "two or more probes" in lone["reason"]
    assert "broken.csv.meta.json" in broken["reason"] and "cannot read the metadata" in broken["reason"]


def test_each_scans_datasheet_carries_the_manifest_over_the_sidecar(fleet):
    _, out = fleet
    conditions = json.loads((out / "scans" / "a" / "datasheet.json").read_text())["conditions"]
    assert conditions["wavelength_nm"] == 1310.0  # manifest overrides the sidecar's 1550, as --meta does
    assert conditions["bias_current_ua"] == 8.0 and conditions["device"] == "WN-8" and conditions["lab_room"] == "B12"


def test_sweeps_and_report_carry_the_metadata(fleet):
    result, out = fleet
    (sweep,) = result.sweeps
    assert sweep["metadata"]["device"] == "WN-8"  # both ok scans of the group share it
    assert sweep["metadata"]["serial"] == "" and math.isnan(sweep["metadata"]["temperature_k"])  # they differ
    table = pd.read_csv(out / "sweeps.csv", keep_default_na=False, na_values=[""])
    assert table.loc[0, "device"] == "WN-8" and math.isnan(table.loc[0, "temperature_k"])
    page = (out / "batch_report.html").read_text()
    scans = page[page.index(">Scans<"):]
    assert "<th>device</th><th>serial</th><th>temperature_k</th>" in scans and "<td>WN-9</td>" in scans


@pytest.mark.parametrize("rows, line, message", [
    ("scan,wavelength_nm\na.csv,1550\nb.csv,-5\n", "line 3",
     "metadata key 'wavelength_nm': expected a positive finite number"),
    ("scan,temperature_k\na.csv,cold\nb.csv,warm\n", "line 2",
     "metadata key 'temperature_k': expected a number, got 'cold'"),
])
def test_bad_metadata_cells_of_a_manifest_are_refused_before_any_work(tmp_path, capsys, rows, line, message):
    manifest = tmp_path / "m.csv"
    manifest.write_text(rows)
    with pytest.raises(InputFileError, match=line) as caught:
        # a scheduler address where nothing listens: the refusal must come before any connection
        povmfit.characterise_many(manifest, tmp_path / "out", scheduler="tcp://127.0.0.1:1")
    assert message in str(caught.value) and str(manifest) in str(caught.value)
    assert main(["batch", str(manifest), "-o", str(tmp_path / "out"), "--scheduler", "tcp://127.0.0.1:1"]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and message in err[0] and line in err[0]
    assert not (tmp_path / "out").exists()
