"""``povmfit tally``: the command line, bad input refused with one line and nothing written,
and the full chain pulse heights -> scan -> fit."""
from __future__ import annotations

import json

import numpy as np

import povmfit
from povmfit.fitting.cli.main import main
from test_tally_spectra import TRUE, write_lab

Z_999 = 3.29  # two-sided 99.9 % normal quantile (scipy.stats.norm.ppf(0.9995))


def _refused(capsys, argv, out_dir, message):
    code = main(argv)
    err = capsys.readouterr().err.strip()
    assert code == 2
    assert len(err.splitlines()) == 1 and "Traceback" not in err
    assert message in err, err
    assert not out_dir.exists() or not any(out_dir.iterdir())  # nothing written
    return err


def test_pulse_heights_cli_writes_scan_readout_and_report(tmp_path, capsys):
    probes = write_lab(tmp_path, triggers=20_000, seed=3)
    out = tmp_path / "out"
    assert main(["tally", "pulse-heights", str(probes), "--out", str(out / "scan.csv"), "--max-photons", "5",
                 "--report", "--json"]) == 0
    summary = json.loads(capsys.readouterr().out)
    assert summary["schema"] == "povmfit.readout/1" and summary["max_outcome"] == 5
    assert sorted(p.name for p in out.iterdir()) == ["readout.json", "scan.csv", "scan.tally.html"]
    scan = povmfit.load_scan(out / "scan.csv")
    assert scan.n_outcomes == 6 and (scan.shots == 20_000).all()
    assert "<svg" in (out / "scan.tally.html").read_text()


def test_click_log_cli(tmp_path, capsys):
    (tmp_path / "a.txt").write_text("101\n000\n111\n100\n")
    (tmp_path / "probes.csv").write_text("probe,coherent_photons,thermal_photons,log\na,1.5,0,a.txt\n")
    assert main(["tally", "click-log", str(tmp_path / "probes.csv"), "-o", str(tmp_path / "o" / "s.csv")]) == 0
    assert "3 channels" in capsys.readouterr().out
    # by hand: patterns 101, 000, 111, 100 have 2, 0, 3, 1 clicks
    assert povmfit.load_scan(tmp_path / "o" / "s.csv").counts.tolist() == [[1, 1, 1, 1]]
    assert (tmp_path / "o" / "s.patterns.csv").exists() and (tmp_path / "o" / "s.channels.csv").exists()


def _heights_lab(tmp_path, text="0.1\n1.1\n"):
    (tmp_path / "h.txt").write_text(text)
    (tmp_path / "probes.csv").write_text("probe,coherent_photons,thermal_photons,heights\nh,1,0,h.txt\n")
    return str(tmp_path / "probes.csv")


def test_bad_pulse_height_input_is_refused_with_one_line(tmp_path, capsys):
    out = tmp_path / "out"
    argv = lambda probes: ["tally", "pulse-heights", probes, "--out", str(out / "scan.csv")]  # noqa: E731
    _refused(capsys, argv(_heights_lab(tmp_path, "0.1\n1.2\nabc\n0.3\n")), out, "h.txt: line 3: pulse height 'abc'")
    _refused(capsys, argv(_heights_lab(tmp_path, "0.1\n\n1,2\n")), out, "h.txt: line 3: pulse height '1,2'")
    _refused(capsys, argv(_heights_lab(tmp_path, "0.1\nnan\n")), out, "h.txt: line 2: pulse height 'nan'")
    _refused(capsys, argv(_heights_lab(tmp_path, "")), out, "h.txt: empty spectrum")
    np.save(tmp_path / "e.npy", np.zeros(0))
    (tmp_path / "probes.csv").write_text("probe,coherent_photons,thermal_photons,heights\nh,1,0,e.npy\n")
    _refused(capsys, argv(str(tmp_path / "probes.csv")), out, "e.npy: empty spectrum")
    (tmp_path / "probes.csv").write_text("probe,coherent_photons,thermal_photons,heights\nh,1,0,h.txt\ng,2,0,gone.txt\n")
    _refused(capsys, argv(str(tmp_path / "probes.csv")), out, "probes.csv: line 3: column heights: file 'gone.txt' does not exist")
    _refused(capsys, argv(str(tmp_path / "missing.csv")), out, "missing.csv: the PROBES file does not exist")
    (tmp_path / "probes.csv").write_text("probe,coherent_photons,thermal_photons,heights\nh,-1,0,h.txt\n")
    _refused(capsys, argv(str(tmp_path / "probes.csv")), out, "probes.csv: line 2: column coherent_photons")
    (tmp_path / "hist.csv").write_text("bin_lo,bin_hi,count\n0,1,0\n1,2,0\n")
    (tmp_path / "probes.csv").write_text("probe,coherent_photons,thermal_photons,histogram\nh,1,0,hist.csv\n")
    _refused(capsys, argv(str(tmp_path / "probes.csv")), out, "hist.csv: empty spectrum")
    _refused(capsys, ["tally", "pulse-heights", str(tmp_path / "probes.csv"), "--out", str(out / "scan.txt")], out,
             "--out: the scan file must end in .csv")


def test_spectra_without_separable_peaks_are_refused(tmp_path, capsys):
    # peaks one width apart merge into one hump: nothing to set thresholds between
    params = dict(TRUE, width_0=0.9, width_1=0.3)
    probes = write_lab(tmp_path, params, probes=((1.0, 0.0), (3.0, 0.0)), triggers=20_000)
    out = tmp_path / "out"
    _refused(capsys, ["tally", "pulse-heights", str(probes), "--out", str(out / "scan.csv")], out,
             "no separable peaks")


def test_too_many_outcomes_are_refused(tmp_path, capsys):
    params = dict(TRUE, width_1=0.15)  # peaks broaden with n until neighbours overlap
    probes = write_lab(tmp_path, params, triggers=20_000, seed=2)
    out = tmp_path / "out"
    _refused(capsys, ["tally", "pulse-heights", str(probes), "--out", str(out / "scan.csv"), "--max-photons", "40"],
             out, "--max-photons: peaks")


def test_full_chain_pulse_heights_to_scan_to_fit_recovers_the_efficiency(tmp_path):
    # well-resolved peaks (misassignment of neighbours below 1e-5 up to the top outcome), so
    # a pnr:K fit of the tallied scan sees a loss-only detector of efficiency 0.68 (source:
    # independent Monte Carlo of the heights); within 3.29 stderr (false failure 1e-3)
    params = dict(TRUE, width_0=0.05, width_1=0.02)
    probes = write_lab(tmp_path, params, triggers=40_000, seed=9)
    tally = povmfit.tally_pulse_heights(probes)
    assert tally.separation.max() < 1e-5
    fit = povmfit.fit(tally.scan, f"pnr:{tally.max_outcome}")
    assert abs(fit.values["efficiency"] - 0.68) < Z_999 * fit.stderr["efficiency"]
    # the tally's own efficiency (from the spectra) agrees too
    entry = tally.parameters["efficiency"]
    assert abs(entry["value"] - 0.68) < Z_999 * entry["stderr"]
