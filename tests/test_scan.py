"""Scan loading and validation: every refusal names file, line (or row) and column.

The expected values in these tests are the invented numbers written into the fixture files
themselves (common practice, no source); cutoff numbers come from an independent direct
call of povmfit.models.choose_cutoff.
"""
from __future__ import annotations

import hashlib
import os

import numpy as np
import pandas as pd
import pytest

from povmfit.fitting.data.errors import ScanError
from povmfit.fitting.data.scan import MAX_CUTOFF, Scan, load_scan, scan_from_arrays, write_scan
from povmfit.models import choose_cutoff

WIDE = """probe,coherent_photons,thermal_photons,shots,count_0,count_1,count_2
a,0.5,0,100,60,30,10
b,1.0,0.1,200,80,70,50
c,2.5,0,50,5,20,25
"""


def write(tmp_path, text, name="scan.csv"):
    path = tmp_path / name
    path.write_text(text, encoding="utf-8")
    return path


def refusal(path, prefix, *fragments):
    """Load ``path``, expect an ScanError whose one-line message starts with ``prefix``."""
    with pytest.raises(ScanError) as caught:
        load_scan(path)
    message = str(caught.value)
    assert "\n" not in message
    assert message.startswith(prefix), message
    for fragment in fragments:
        assert fragment in message, message
    return message


def replace_line(text, line, new):
    lines = text.splitlines()
    lines[line - 1] = new
    return "\n".join(lines) + "\n"


# ----------------------------------------------------------------------------- valid input


def test_wide_csv_loads_every_field(tmp_path):
    path = write(tmp_path, WIDE)
    scan = load_scan(path)
    np.testing.assert_array_equal(scan.coherent_photons, [0.5, 1.0, 2.5])
    np.testing.assert_array_equal(scan.thermal_photons, [0.0, 0.1, 0.0])
    np.testing.assert_array_equal(scan.shots, [100, 200, 50])
    np.testing.assert_array_equal(scan.counts, [[60, 30, 10], [80, 70, 50], [5, 20, 25]])
    assert scan.counts.dtype == np.int64 and scan.shots.dtype == np.int64
    assert scan.labels == ("a", "b", "c")
    assert scan.phase_rad is None and scan.pattern_counts is None
    assert scan.source == str(path)
    assert scan.sha256 == hashlib.sha256(path.read_bytes()).hexdigest()
    assert (scan.n_probes, scan.n_outcomes, scan.max_outcome) == (3, 3, 2)
    np.testing.assert_allclose(scan.frequencies[1], [0.4, 0.35, 0.25])
    with pytest.raises(ValueError):
        scan.counts[0, 0] = 1  # read-only arrays: a frozen scan stays frozen


def test_columns_in_any_order_with_phase_and_without_labels(tmp_path):
    path = write(tmp_path, "count_1,phase_rad,shots,thermal_photons,count_0,coherent_photons\n"
                           "3,0.25,10,0,7,0.3\n4,-1.5,10,0.2,6,0\n")
    scan = load_scan(path)
    np.testing.assert_array_equal(scan.counts, [[7, 3], [6, 4]])
    np.testing.assert_array_equal(scan.phase_rad, [0.25, -1.5])
    assert scan.labels is None


def test_wide_parquet_matches_csv(tmp_path):
    csv_scan = load_scan(write(tmp_path, WIDE))
    frame = pd.read_csv(tmp_path / "scan.csv")
    frame.to_parquet(tmp_path / "scan.parquet", index=False)
    scan = load_scan(tmp_path / "scan.parquet")
    for field in ("coherent_photons", "thermal_photons", "shots", "counts"):
        np.testing.assert_array_equal(getattr(scan, field), getattr(csv_scan, field))
    assert scan.labels == csv_scan.labels


def test_long_csv_matches_wide(tmp_path):
    long_text = "probe,coherent_photons,thermal_photons,outcome,count\n" + "".join(
        f"{label},{a},{t},{k},{n}\n"
        for label, a, t, row in [("a", 0.5, 0, (60, 30, 10)), ("b", 1.0, 0.1, (80, 70, 50)), ("c", 2.5, 0, (5, 20, 25))]
        for k, n in reversed(list(enumerate(row)))  # outcomes in any order
    )
    scan = load_scan(write(tmp_path, long_text, "long.csv"))
    wide = load_scan(write(tmp_path, WIDE))
    for field in ("coherent_photons", "thermal_photons", "shots", "counts"):
        np.testing.assert_array_equal(getattr(scan, field), getattr(wide, field))
    assert scan.labels == ("a", "b", "c")


def test_long_layout_rows_of_probes_may_interleave(tmp_path):
    text = ("probe,coherent_photons,thermal_photons,phase_rad,outcome,count\n"
            "x,1,0,0.5,0,4\ny,2,0,1.5,0,1\nx,1,0,0.5,1,6\ny,2,0,1.5,1,9\n")
    scan = load_scan(write(tmp_path, text))
    np.testing.assert_array_equal(scan.counts, [[4, 6], [1, 9]])
    np.testing.assert_array_equal(scan.phase_rad, [0.5, 1.5])


def test_click_patterns_are_summed_by_number_of_clicks(tmp_path):
    # three pixels: outcome = number of '1' characters; unlisted patterns count 0
    text = ("probe,coherent_photons,thermal_photons,pattern,count\n"
            "p,1.0,0,000,50\np,1.0,0,100,10\np,1.0,0,010,12\np,1.0,0,011,7\np,1.0,0,111,1\n"
            "q,0.2,0,000,90\nq,0.2,0,001,10\n")
    scan = load_scan(write(tmp_path, text))
    np.testing.assert_array_equal(scan.counts, [[50, 22, 7, 1], [90, 10, 0, 0]])
    np.testing.assert_array_equal(scan.shots, [80, 100])
    assert scan.n_outcomes == 4
    assert scan.pattern_counts == ({"000": 50, "100": 10, "010": 12, "011": 7, "111": 1}, {"000": 90, "001": 10})


def test_duplicate_probe_settings_are_separate_rows(tmp_path):
    scan = load_scan(write(tmp_path, "coherent_photons,thermal_photons,shots,count_0,count_1\n"
                                     "1,0,10,4,6\n1,0,10,5,5\n"))
    np.testing.assert_array_equal(scan.counts, [[4, 6], [5, 5]])


def test_blank_lines_skipped_but_counted_and_bom_and_crlf_accepted(tmp_path):
    path = tmp_path / "scan.csv"
    text = "\ufeffcoherent_photons,thermal_photons,shots,count_0,count_1\r\n1,0,10,4,6\r\n\r\n1,0,10,5,4\r\n"
    path.write_bytes(text.encode("utf-8"))
    refusal(path, f"{path}:4: column shots: ", "counts sum to 9 but shots is 10")


@pytest.mark.parametrize("suffix", [".csv", ".parquet"])
def test_write_then_load_round_trips_exactly(tmp_path, suffix):
    rng = np.random.default_rng(7)
    counts = rng.integers(0, 1000, size=(5, 4))
    counts[:, 0] += 1
    original = scan_from_arrays(
        coherent=[0.1, 1 / 3, 1e-300, 2.0, 0.0], thermal=[0.0, 0.2, 0.0, 1e-7, 0.7], counts=counts,
        phase=[0.0, np.pi, -0.1, 2.5, 1e-9], labels=["a,1", 'quote "b"', "c", "c", "e"],
    )
    path = tmp_path / f"out{suffix}"
    write_scan(original, path)
    again = load_scan(path)
    for field in ("coherent_photons", "thermal_photons", "shots", "counts", "phase_rad"):
        np.testing.assert_array_equal(getattr(again, field), getattr(original, field))
    assert again.labels == original.labels
    assert not [p for p in tmp_path.iterdir() if p.name.startswith(".")]  # no temporary file left


def test_loading_never_modifies_the_input(tmp_path):
    path = write(tmp_path, WIDE)
    before = (path.read_bytes(), os.stat(path).st_mtime_ns)
    load_scan(path)
    with pytest.raises(ScanError):
        load_scan(write(tmp_path, WIDE.replace("60,30,10", "60,30,11"), "bad.csv"))
    assert (path.read_bytes(), os.stat(path).st_mtime_ns) == before


def test_subset_keeps_provenance_and_selects_rows(tmp_path):
    scan = load_scan(write(tmp_path, WIDE))
    picked = scan.subset(np.array([True, False, True]))
    np.testing.assert_array_equal(picked.counts, scan.counts[[0, 2]])
    assert picked.labels == ("a", "c") and picked.sha256 == scan.sha256 and picked.source == scan.source
    assert scan.subset([2]).labels == ("c",)


def test_normal_three_hundred_row_scan_loads(tmp_path):
    rng = np.random.default_rng(3)
    coherent = rng.uniform(0, 30, 300)
    thermal = rng.uniform(0, 3, 300)
    counts = rng.integers(0, 500, size=(300, 9))
    original = scan_from_arrays(coherent, thermal, counts + 1)
    write_scan(original, tmp_path / "big.csv")
    np.testing.assert_array_equal(load_scan(tmp_path / "big.csv").counts, counts + 1)


def test_probe_just_below_the_cutoff_limit_is_accepted(tmp_path):
    needed = choose_cutoff(800.0, 0.0, tolerance=1e-10)  # independent call: 987
    assert needed < MAX_CUTOFF
    scan = load_scan(write(tmp_path, "coherent_photons,thermal_photons,shots,count_0,count_1\n800,0,5,0,5\n"))
    assert scan.n_probes == 1


# ----------------------------------------------------------------------------- file-level refusals


def test_refuses_missing_file(tmp_path):
    path = tmp_path / "absent.csv"
    refusal(path, f"{path}: cannot read")


def test_refuses_empty_file(tmp_path):
    refusal(write(tmp_path, ""), f"{tmp_path / 'scan.csv'}: empty file")


def test_refuses_header_without_rows(tmp_path):
    path = write(tmp_path, "coherent_photons,thermal_photons,shots,count_0,count_1\n")
    refusal(path, f"{path}:1: no data rows")


@pytest.mark.parametrize("name", ["scan.txt", "scan"])
def test_refuses_unknown_format(tmp_path, name):
    path = write(tmp_path, WIDE, name)
    refusal(path, f"{path}: unknown format", ".csv or .parquet")


def test_refuses_damaged_parquet(tmp_path):
    path = tmp_path / "scan.parquet"
    path.write_bytes(b"this is not parquet")
    refusal(path, f"{path}: cannot read as Parquet")


def test_refuses_row_with_wrong_number_of_fields(tmp_path):
    path = write(tmp_path, replace_line(WIDE, 3, "b,1.0,0.1,200,80,70"))
    refusal(path, f"{path}:3: expected 7 fields", "found 6")


# ----------------------------------------------------------------------------- column refusals


def test_refuses_missing_required_column(tmp_path):
    path = write(tmp_path, "coherent_photons,shots,count_0,count_1\n1,10,4,6\n")
    refusal(path, f"{path}:1: column thermal_photons: required column is missing")


def test_refuses_gap_in_count_columns(tmp_path):
    path = write(tmp_path, "coherent_photons,thermal_photons,shots,count_0,count_1,count_3\n1,0,10,4,6,0\n")
    refusal(path, f"{path}:1: column count_2: missing", "count_0 .. count_3")


def test_refuses_count_columns_not_starting_at_zero(tmp_path):
    path = write(tmp_path, "coherent_photons,thermal_photons,shots,count_1,count_2\n1,0,10,4,6\n")
    refusal(path, f"{path}:1: column count_0: required column is missing")


def test_refuses_single_outcome(tmp_path):
    path = write(tmp_path, "coherent_photons,thermal_photons,shots,count_0\n1,0,10,10\n")
    refusal(path, f"{path}:1: column count_1: missing", "at least two outcomes")


@pytest.mark.parametrize("name", ["temperature", "Shots", "count_01"])
def test_refuses_unknown_columns_naming_them(tmp_path, name):
    path = write(tmp_path, f"coherent_photons,thermal_photons,shots,count_0,count_1,{name}\n1,0,10,4,6,1\n")
    refusal(path, f"{path}:1: column '{name}': unknown column", "case sensitive")


def test_refuses_duplicate_column(tmp_path):
    path = write(tmp_path, "coherent_photons,thermal_photons,shots,count_0,count_1,shots\n1,0,10,4,6,10\n")
    refusal(path, f"{path}:1: column shots: appears twice")


def test_refuses_mixed_layouts(tmp_path):
    path = write(tmp_path, "probe,coherent_photons,thermal_photons,shots,outcome,count\na,1,0,10,0,10\n")
    refusal(path, f"{path}:1: column shots: not allowed in the long layout")


# ----------------------------------------------------------------------------- cell refusals (wide)


@pytest.mark.parametrize(
    "line, new, column, fragment",
    [
        (3, "b,1.0,0.1,200,80,70,51", "shots", "counts sum to 201 but shots is 200"),
        (2, "a,0.5,0,100,60,-1,41", "count_1", "count must be >= 0, got -1"),
        (4, "c,2.5,0,50,5,19.5,25.5", "count_1", "count must be a whole number, got 19.5"),
        (3, "b,1.0,0.1,-200,-80,-70,-50", "shots", "shots must be >= 0, got -200"),
        (4, "c,2.5,0,50.5,5,20,25", "shots", "shots must be a whole number"),
        (4, "c,2.5,0,0,0,0,0", "shots", "shots must be > 0, got 0"),
        (2, "a,nan,0,100,60,30,10", "coherent_photons", "not a number (NaN)"),
        (3, "b,1.0,,200,80,70,50", "thermal_photons", "empty cell"),
        (3, "b,1.0,0.1,200,80,seventy,50", "count_1", "text 'seventy' where a number is expected"),
        (3, "b,1.0,0.1,2OO,80,70,50", "shots", "text '2OO'"),
        (4, "c,-2.5,0,50,5,20,25", "coherent_photons", "photon number must be >= 0, got -2.5"),
        (2, "a,0.5,-0.1,100,60,30,10", "thermal_photons", "must be >= 0"),
        (3, "b,1.0,inf,200,80,70,50", "thermal_photons", "infinite value inf"),
        (2, "a,0.5,0,100,60,30,inf", "count_2", "infinite value"),
        (2, ",0.5,0,100,60,30,10", "probe", "empty cell"),
    ],
)
def test_refuses_bad_cells_with_line_and_column(tmp_path, line, new, column, fragment):
    path = write(tmp_path, replace_line(WIDE, line, new))
    refusal(path, f"{path}:{line}: column {column}: ", fragment)


@pytest.mark.parametrize("value, fragment", [("nan", "not a number (NaN)"), ("-inf", "infinite value")])
def test_refuses_non_finite_phase(tmp_path, value, fragment):
    path = write(tmp_path, f"coherent_photons,thermal_photons,phase_rad,shots,count_0,count_1\n"
                           f"1,0,0.5,10,4,6\n1,0,{value},10,4,6\n")
    refusal(path, f"{path}:3: column phase_rad: ", fragment)


def test_refuses_only_dark_probes(tmp_path):
    path = write(tmp_path, "coherent_photons,thermal_photons,shots,count_0,count_1\n0,0,10,9,1\n0,0.0,10,10,0\n")
    refusal(path, f"{path}: column coherent_photons: cannot identify a detector: no probe has light")


def test_refuses_too_bright_probe_with_exact_cutoff(tmp_path):
    # 400 coherent + 100 thermal photons: the cutoff search itself (no limit) gives the number
    needed = choose_cutoff(400.0, 100.0, tolerance=1e-10)
    assert needed > MAX_CUTOFF
    text = WIDE.replace("c,2.5,0,50", "c,400,100,50")
    path = write(tmp_path, text)
    refusal(path, f"{path}:4: column coherent_photons: probe too bright",
            f"cutoff of {needed} for a tail below 1e-10", f"limit {MAX_CUTOFF}")


def test_refuses_first_too_bright_probe_in_file_order(tmp_path):
    # line 3 needs far more than the limit (mean/2 alone exceeds it), line 4 a little more
    text = WIDE.replace("b,1.0,0.1,200", "b,9000,0,200").replace("c,2.5,0,50", "c,400,100,50")
    path = write(tmp_path, text)
    needed = choose_cutoff(9000.0, 0.0, tolerance=1e-10)
    refusal(path, f"{path}:3: column coherent_photons: probe too bright", f"cutoff of {needed} ")


def test_refuses_extremely_bright_probe_quickly_with_an_estimate(tmp_path):
    path = write(tmp_path, WIDE.replace("a,0.5,0,100", "a,0.5,1e7,100"))
    message = refusal(path, f"{path}:2: column thermal_photons: probe too bright", "cutoff of about ")
    # geometric tail of a thermal state: (nbar/(1+nbar))^N < 1e-10 needs N ~ ln(1e10) nbar = 2.3e8
    assert "2.3e+08" in message


# ----------------------------------------------------------------------------- long and pattern refusals

LONG = ("probe,coherent_photons,thermal_photons,outcome,count\n"
        "a,1,0,0,4\na,1,0,1,6\nb,2,0,0,1\nb,2,0,1,9\n")


@pytest.mark.parametrize(
    "line, new, column, fragment",
    [
        (5, "b,2,0.5,1,9", "thermal_photons", "probe 'b' has 0.5 here but 0.0 on line 4"),
        (5, "b,2,0,2,9", "outcome", "probe 'a' lacks outcome 2"),
        (5, "b,2,0,0,9", "outcome", "outcome 0 of probe 'b' already given on line 4"),
        (3, "a,1,0,1.5,6", "outcome", "outcome must be a whole number"),
        (3, "a,1,0,-1,6", "outcome", "outcome must be >= 0"),
        (3, "a,1,0,1,-6", "count", "count must be >= 0"),
        (3, "a,-1,0,1,6", "coherent_photons", "must be >= 0"),
        (2, ",1,0,0,4", "probe", "empty cell"),
    ],
)
def test_long_layout_refusals(tmp_path, line, new, column, fragment):
    path = write(tmp_path, replace_line(LONG, line, new))
    expected_line = 2 if "lacks" in fragment else line  # a missing outcome points at the probe's first line
    refusal(path, f"{path}:{expected_line}: column {column}: ", fragment)


def test_long_layout_probe_without_shots(tmp_path):
    path = write(tmp_path, LONG.replace("b,2,0,0,1", "b,2,0,0,0").replace("b,2,0,1,9", "b,2,0,1,0"))
    refusal(path, f"{path}:4: column count: all counts of this probe are 0")


def test_long_layout_single_outcome(tmp_path):
    path = write(tmp_path, "probe,coherent_photons,thermal_photons,outcome,count\na,1,0,0,4\n")
    refusal(path, f"{path}:1: column outcome: only outcome 0 appears")


PATTERNS = ("probe,coherent_photons,thermal_photons,pattern,count\n"
            "p,1.0,0,00,50\np,1.0,0,10,10\np,1.0,0,11,5\n")


@pytest.mark.parametrize(
    "line, new, fragment",
    [
        (3, "p,1.0,0,1x,10", "'1x' contains characters other than 0 and 1"),
        (4, "p,1.0,0,110,5", "'110' has 3 pixels but the first pattern has 2"),
        (4, "p,1.0,0,10,5", "pattern 10 of probe 'p' is listed twice"),
        (3, "p,1.0,0,,10", "empty cell"),
    ],
)
def test_pattern_refusals(tmp_path, line, new, fragment):
    path = write(tmp_path, replace_line(PATTERNS, line, new))
    refusal(path, f"{path}:{line}: column pattern: ", fragment)


def test_pattern_and_outcome_together_refused(tmp_path):
    path = write(tmp_path, "probe,coherent_photons,thermal_photons,pattern,outcome,count\np,1,0,01,1,3\n")
    refusal(path, f"{path}:1: column pattern: a file gives either outcome or pattern rows")


# ----------------------------------------------------------------------------- Parquet and arrays


def test_parquet_refusal_names_the_row(tmp_path):
    frame = pd.DataFrame({"coherent_photons": [1.0, 2.0, 3.0], "thermal_photons": [0.0, 0.0, 0.0],
                          "shots": [10, 10, 10], "count_0": [5, 5, 5], "count_1": [5, -5, 5]})
    path = tmp_path / "scan.parquet"
    frame.to_parquet(path, index=False)
    refusal(path, f"{path}: row 2: column count_1: count must be >= 0, got -5")


def test_parquet_text_and_null_cells(tmp_path):
    path = tmp_path / "scan.parquet"
    pd.DataFrame({"coherent_photons": ["1.0", "bright"], "thermal_photons": [0.0, None],
                  "shots": [10, 10], "count_0": [5, 5], "count_1": [5, 5]}).to_parquet(path, index=False)
    refusal(path, f"{path}: row 2: column coherent_photons: text 'bright'")


def test_parquet_pattern_must_be_text(tmp_path):
    path = tmp_path / "scan.parquet"
    pd.DataFrame({"probe": ["p"], "coherent_photons": [1.0], "thermal_photons": [0.0],
                  "pattern": [101], "count": [3]}).to_parquet(path, index=False)
    refusal(path, f"{path}: row 1: column pattern: must be text of 0/1 characters")


def test_arrays_are_validated_like_files():
    with pytest.raises(ScanError, match=r"^<memory>: row 2: column count_1: count must be >= 0, got -1$"):
        scan_from_arrays([1.0, 2.0], [0.0, 0.0], [[3, 4], [5, -1]])
    with pytest.raises(ScanError, match=r"^<memory>: row 1: column coherent_photons: not a number"):
        scan_from_arrays([np.nan, 2.0], [0.0, 0.0], [[3, 4], [5, 1]])
    with pytest.raises(ScanError, match=r"^lab: column thermal_photons: expected shape \(2,\)"):
        scan_from_arrays([1.0, 2.0], [0.0], [[3, 4], [5, 1]], source="lab")
    with pytest.raises(ScanError, match=r"^<memory>: column counts: expected shape"):
        scan_from_arrays([1.0], [0.0], [[3]])
    with pytest.raises(ScanError, match=r"^<memory>: row 1: column count_0: all counts of this probe are 0"):
        scan_from_arrays([1.0], [0.0], [[0, 0]])
    scan = scan_from_arrays([1.0, 2.0], [0.0, 0.5], np.array([[3.0, 4.0], [5.0, 1.0]]), labels=["x", "y"])
    assert isinstance(scan, Scan) and scan.sha256 is None and scan.source == "<memory>"
    np.testing.assert_array_equal(scan.shots, [7, 6])
    assert scan.counts.dtype == np.int64


# ----------------------------------------------------------------------------- limits and overflow
def test_unsigned_counts_above_int64_are_refused_not_wrapped(tmp_path):
    import pyarrow as pa
    import pyarrow.parquet as pq

    table = pa.table({"coherent_photons": [1.0, 2.0], "thermal_photons": [0.0, 0.0],
                      "shots": pa.array([2**63 + 5, 10], pa.uint64()),
                      "count_0": pa.array([2**63, 4], pa.uint64()), "count_1": pa.array([5, 6], pa.uint64())})
    path = tmp_path / "scan.parquet"
    pq.write_table(table, path)
    refusal(path, f"{path}: row 1: column shots", "above the limit 9007199254740992")


def test_shots_of_a_probe_may_not_pass_two_to_the_53(tmp_path):
    # each count is allowed, their sum is not: refused before the int64 sum
    half = 2**52 + 2
    path = write(tmp_path, f"coherent_photons,thermal_photons,shots,count_0,count_1\n1,0,{2 * half},{half},{half}\n")
    refusal(path, f"{path}:2: column shots", "above the limit")


def test_long_layout_outcome_limit_is_checked_before_allocating(tmp_path):
    path = write(tmp_path, "probe,coherent_photons,thermal_photons,outcome,count\na,1,0,0,1\na,1,0,1001,1\n")
    refusal(path, f"{path}:3: column outcome", "limit 1000")
