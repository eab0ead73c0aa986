"""Click-log tally: scans, patterns and channel probabilities against binning by hand."""
from __future__ import annotations

import numpy as np
import pytest

import povmfit
from povmfit.fitting.tally import click_log

CHANNELS = 5


def _masks(rng, size, p):
    """Per-trigger bitmasks: channel i fires with probability p[i], independently."""
    fired = rng.random((size, len(p))) < np.asarray(p)
    return (fired * (1 << np.arange(len(p)))).sum(axis=1).astype(np.int64), fired


def _pattern(mask: int, width: int) -> str:
    return "".join("1" if mask >> c & 1 else "0" for c in range(width))


@pytest.fixture(scope="module")
def lab(tmp_path_factory):
    """Three probes, one log in each layout: text bitmasks, text patterns, .npy bitmasks."""
    folder = tmp_path_factory.mktemp("clicks")
    rng = np.random.default_rng(11)
    logs = {}
    probabilities = ([0.05, 0.06, 0.04, 0.05, 0.07], [0.3, 0.25, 0.35, 0.3, 0.2], [0.6, 0.55, 0.65, 0.7, 0.5])
    for i, p in enumerate(probabilities):
        masks, fired = _masks(rng, 20_000 + 1000 * i, p)
        logs[f"p{i}"] = masks
        if i == 0:
            (folder / "p0.txt").write_text("\n".join(map(str, masks)) + "\n")
        elif i == 1:  # patterns with CRLF line ends and a blank line in the middle
            lines = [_pattern(int(m), CHANNELS) for m in masks]
            lines.insert(500, "")
            (folder / "p1.txt").write_bytes(("\r\n".join(lines) + "\r\n").encode())
        else:
            np.save(folder / "p2.npy", masks.astype(np.uint16))
    (folder / "probes.csv").write_text("probe,coherent_photons,thermal_photons,log\n"
                                       "p0,0.3,0,p0.txt\np1,2.5,0,p1.txt\np2,6.0,0.5,p2.npy\n")
    return folder, logs


def test_click_log_scan_equals_binning_by_hand(lab):
    folder, logs = lab
    result = povmfit.tally_click_log(folder / "probes.csv")
    assert result.channels == CHANNELS
    for p, label in enumerate(("p0", "p1", "p2")):
        masks = logs[label]
        # source: binning by hand (Python's own bit counting, one trigger at a time)
        by_hand = np.zeros(CHANNELS + 1, dtype=np.int64)
        for m in masks.tolist():
            by_hand[bin(m).count("1")] += 1
        assert result.scan.counts[p].tolist() == by_hand.tolist()
        patterns = {}
        for m in masks.tolist():
            key = _pattern(m, CHANNELS)
            patterns[key] = patterns.get(key, 0) + 1
        assert result.patterns[p] == patterns
        clicks = [(masks >> c & 1).sum() for c in range(CHANNELS)]
        assert result.channel_clicks[p].tolist() == clicks
    assert [row["layout"] for row in result.probes] == ["bitmask", "pattern", "bitmask"]


def test_written_files_read_back(lab, tmp_path):
    folder, logs = lab
    result = povmfit.tally_click_log(folder / "probes.csv", channels=CHANNELS)
    files = result.write(tmp_path / "scan.csv")
    scan = povmfit.load_scan(files["scan"])
    assert scan.counts.tolist() == result.scan.counts.tolist()
    patterns = povmfit.load_scan(files["patterns"])  # the pattern layout of the scan file
    assert patterns.counts.tolist() == result.scan.counts.tolist()
    import pandas as pd

    channels = pd.read_csv(files["channels"])
    row = channels[(channels.probe == "p1") & (channels.channel == 2)].iloc[0]
    assert row.probability == pytest.approx((logs["p1"] >> 2 & 1).mean(), abs=1e-15)
    assert row.stderr == pytest.approx(np.sqrt(row.probability * (1 - row.probability) / row.triggers))


def test_small_blocks_give_the_same_tally(lab):
    folder, logs = lab
    for name in ("p0.txt", "p1.txt", "p2.npy"):
        whole = click_log.tally_log(folder / name, name)
        pieces = click_log.tally_log(folder / name, name, block_bytes=997, block_values=1001)
        assert whole.items()[0].tolist() == pieces.items()[0].tolist()
        assert whole.items()[1].tolist() == pieces.items()[1].tolist()


def test_bitmask_wider_than_channels_is_refused_with_its_line(lab, tmp_path):
    (tmp_path / "a.txt").write_text("3\n1\n\n40\n2\n")
    (tmp_path / "probes.csv").write_text("probe,coherent_photons,thermal_photons,log\na,1,0,a.txt\n")
    with pytest.raises(povmfit.PovmfitError, match=r"a.txt: line 4: bitmask 40 has a bit above channel 4"):
        povmfit.tally_click_log(tmp_path / "probes.csv", channels=5)
    (tmp_path / "a.txt").write_text("3\n1\nx1\n")
    with pytest.raises(povmfit.PovmfitError, match=r"a.txt: line 3: 'x1' is not a bitmask"):
        povmfit.tally_click_log(tmp_path / "probes.csv")
    (tmp_path / "a.txt").write_text("0110\n0111\n011\n")
    with pytest.raises(povmfit.PovmfitError, match=r"a.txt: line 3: '011' is not a pattern of 4 characters"):
        povmfit.tally_click_log(tmp_path / "probes.csv")
