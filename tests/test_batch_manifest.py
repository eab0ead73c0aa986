"""Manifests of ``povmfit batch``: what is accepted, and bad manifests refused with one line
(exit code 2, nothing written, no cluster started). Plumbing: no numbers checked.
Source of every expected value: the manifest contract in the README (common practice, no source)."""
from __future__ import annotations

import pandas as pd
import pytest

import povmfit
from povmfit.fitting.cli.main import main
from povmfit.fitting.data.errors import InputFileError
from povmfit.fitting.data.manifest import load_manifest


def write(tmp_path, text, name="manifest.csv"):
    path = tmp_path / name
    path.write_text(text)
    return path


def test_conditions_are_typed_and_paths_resolved(tmp_path):
    path = write(tmp_path, "scan,bias_current_ua,channel,model,calibration_uncertainty\n"
                           "a.csv,8.5,A,,\nsub/b.csv,9,B7,array:4+dark,0.03\n")
    manifest = load_manifest(path)
    assert manifest.conditions == ("bias_current_ua", "channel") and manifest.numeric == ("bias_current_ua",)
    assert manifest.text == ("channel",)
    first, second = manifest.rows
    assert first.path == (tmp_path / "a.csv").resolve() and second.path == (tmp_path / "sub" / "b.csv").resolve()
    assert first.conditions == {"bias_current_ua": 8.5, "channel": "A"} and first.model is None
    assert second.model == "array:4+dark" and second.calibration_uncertainty == 0.03
    assert first.calibration_uncertainty is None and second.place == "line 3"


def test_parquet_manifest(tmp_path):
    path = tmp_path / "m.parquet"
    pd.DataFrame({"scan": ["a.csv", "b.csv"], "temperature_k": [0.8, 1.2], "device": ["X", "Y"]}).to_parquet(path)
    manifest = load_manifest(path)
    assert manifest.numeric == ("temperature_k",) and manifest.text == ("device",)


@pytest.mark.parametrize("text, expected", [
    ("file,bias\na.csv,1\n", "manifest.csv:1: no column 'scan'"),
    ("scan,bias\na.csv,1\nb.csv,2\na.csv,3\n", "manifest.csv:4: column scan: a.csv is listed again (first on line 2)"),
    ("scan,bias\na.csv,1\nb.csv,1O\n", "manifest.csv:3: column bias: text '1O' where the other cells are numbers"),
    ("scan,bias\na.csv,1\nb.csv,\n", "manifest.csv:3: column bias: empty cell"),
    ("scan,status\na.csv,x\n", "manifest.csv:1: column status: the name is used by the batch's output"),
    ("scan,efficiency_value\na.csv,1\n", "manifest.csv:1: column efficiency_value: the name is used"),
    ("scan,bias,bias\na.csv,1,2\n", "manifest.csv:1: column bias: appears twice"),
    ("scan,model\na.csv,array:x\n", "manifest.csv:2: column model:"),
    ("scan,calibration_uncertainty\na.csv,0.7\n", "manifest.csv:2: column calibration_uncertainty: expected"),
    ("scan,bias\n", "manifest.csv:1: no rows"),
    ("scan,bias\na.csv,1,2\n", "manifest.csv:2: expected 2 fields"),
])
def test_bad_csv_manifests_are_refused_with_one_line(tmp_path, capsys, text, expected):
    path = write(tmp_path, text)
    with pytest.raises(InputFileError) as caught:
        load_manifest(path)
    message = str(caught.value)
    assert "\n" not in message and message.startswith(str(path)) and expected in message.replace(str(tmp_path) + "/", "")
    out = tmp_path / "results"
    assert main(["batch", str(path), "--out", str(out)]) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and err.startswith("povmfit batch: error: ") and expected in err.replace(str(tmp_path) + "/", "")
    assert not out.exists()


def test_unknown_parquet_column_types_are_refused(tmp_path, capsys):
    path = tmp_path / "m.parquet"
    pd.DataFrame({"scan": ["a.csv"], "measured": pd.to_datetime(["2026-01-01"])}).to_parquet(path)
    assert main(["batch", str(path), "--out", str(tmp_path / "out")]) == 2
    err = capsys.readouterr().err.strip()
    assert "column measured: type timestamp" in err and "neither a number nor text" in err and "\n" not in err
    flags = tmp_path / "flags.parquet"
    pd.DataFrame({"scan": ["a.csv"], "cold": [True]}).to_parquet(flags)
    with pytest.raises(InputFileError, match="column cold: type bool is neither a number nor text"):
        load_manifest(flags)


def test_missing_manifest_and_bad_options_are_refused(tmp_path, capsys):
    assert main(["batch", str(tmp_path / "none.csv")]) == 2
    assert "cannot read the manifest" in capsys.readouterr().err
    path = write(tmp_path, "scan,bias\na.csv,1\n")
    for flags, expected in ((["--scheduler", "bogus"], "--scheduler"), (["--workers", "0"], "--workers"),
                            (["--plateau", "0.7"], "--plateau"), (["--dark-limit", "2"], "--dark-limit"),
                            (["--scheduler", "tcp://127.0.0.1:1", "--workers", "2"], "--workers")):
        assert main(["batch", str(path), *flags, "--out", str(tmp_path / "o")]) == 2
        err = capsys.readouterr().err
        assert expected in err and err.count("\n") == 1
    assert not (tmp_path / "o").exists()


def test_library_arguments_are_checked_before_any_work(tmp_path):
    path = write(tmp_path, "scan,bias_a,bias_b\na.csv,1,2\n")
    with pytest.raises(povmfit.ArgumentError, match="bias: several conditions look like a bias"):
        povmfit.characterise_many(path)
    with pytest.raises(povmfit.ArgumentError, match="bias: 'temperature' is not a condition"):
        povmfit.characterise_many(path, bias="temperature")
    with pytest.raises(povmfit.ArgumentError, match="scheduler"):
        povmfit.characterise_many(path, scheduler="threads")
    with pytest.raises(povmfit.ArgumentError, match="model"):
        povmfit.characterise_many(path, model="array:x")
    with pytest.raises(InputFileError, match="<DataFrame>: row 2: column scan: empty cell"):
        povmfit.characterise_many(pd.DataFrame({"scan": ["a.csv", None]}))
