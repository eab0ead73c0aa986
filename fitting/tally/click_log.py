"""Per-trigger click logs: which channels fired on each trigger, tallied per probe.

A log holds one trigger per line (text) or per element (``.npy`` integer array):

* a *bitmask*: a decimal integer >= 0 whose bit i (value 2^i) says channel i fired;
* a *pattern*: a string of N characters 0/1 whose character i (from the left) says channel i
  fired, so the pattern ``100`` is the bitmask 1.

A text file is read as patterns when ``log_format="pattern"``, or with ``"auto"`` when its
first non-blank line has at least two characters, all 0 or 1 (and exactly ``channels`` of
them when the channel count is given); otherwise as bitmasks. (A decimal bitmask written with
N >= 2 digits 0/1 and a leading 1 is at least 10^(N-1) > 2^N - 1, so it cannot be a valid
N-channel bitmask; only zero-padded decimals would be ambiguous, and bitmask writers do not
pad.) ``.npy`` logs are always bitmasks (integer arrays).

The tally of one probe is the number of triggers of every bitmask: a dense array indexed by
the bitmask while the masks stay below 2^:data:`DENSE_CHANNELS`, otherwise a mapping. Memory
stays bounded by one block plus that table. Bad content raises :class:`InputFileError` with
one line naming the file and the line (text) or index (``.npy``).
"""
from __future__ import annotations

import io
from dataclasses import dataclass

import numpy as np
import pandas as pd

from povmfit.fitting.data.errors import InputFileError
from povmfit.fitting.tally.streams import BLOCK_BYTES, BLOCK_VALUES, _open_npy, file_kind, read_lines

__all__ = ["LogTally", "tally_log", "MAX_CHANNELS", "DENSE_CHANNELS", "LOG_FORMATS"]

MAX_CHANNELS = 62  # bitmasks are held as int64
DENSE_CHANNELS = 20  # masks below 2^20 are counted in an array (8 MiB at most)
LOG_FORMATS = ("auto", "bitmask", "pattern")


@dataclass
class LogTally:
    """Triggers per bitmask of one log: ``dense`` (counts indexed by bitmask) plus ``sparse``
    {bitmask: count} for masks at or above 2^DENSE_CHANNELS; ``width``: the pattern width
    (pattern files) or the highest set bit + 1 (bitmasks); ``layout``: "pattern" or "bitmask"."""

    dense: np.ndarray
    sparse: dict
    width: int
    layout: str
    triggers: int = 0

    def add(self, masks: np.ndarray) -> None:
        """Count a block of int64 bitmasks (ValueError, nothing counted, if one is negative)."""
        if masks.size == 0:
            return
        top = int(masks.max())
        if top < (1 << DENSE_CHANNELS):
            counts = np.bincount(masks)  # raises on negative values before anything is counted
            if counts.size > self.dense.size:
                self.dense = np.concatenate([self.dense, np.zeros(counts.size - self.dense.size, dtype=np.int64)])
            self.dense[: counts.size] += counts
            self.width = max(self.width, top.bit_length())
            self.triggers += int(masks.size)
            return
        if int(masks.min()) < 0:
            raise ValueError("negative bitmask")
        self.width = max(self.width, top.bit_length())
        self.triggers += int(masks.size)
        values, counts = np.unique(masks, return_counts=True)
        for value, count in zip(values.tolist(), counts.tolist()):
            if value < self.dense.size:
                self.dense[value] += count
            else:
                self.sparse[value] = self.sparse.get(value, 0) + count

    def items(self) -> tuple[np.ndarray, np.ndarray]:
        """(bitmasks, counts) of every bitmask seen, sorted by bitmask."""
        masks = np.nonzero(self.dense)[0]
        counts = self.dense[masks]
        if self.sparse:
            extra = sorted(self.sparse.items())
            masks = np.concatenate([masks, np.array([m for m, _ in extra], dtype=np.int64)])
            counts = np.concatenate([counts, np.array([c for _, c in extra], dtype=np.int64)])
        return masks.astype(np.int64), counts.astype(np.int64)


def _check_width(masks: np.ndarray, channels: int | None, name: str, where) -> None:
    if channels is not None and masks.size and int(masks.max()) >> channels:
        first = int(np.argmax(masks >> channels != 0))
        raise InputFileError(f"{name}: {where(first)}: bitmask {int(masks[first])} has a bit above channel "
                             f"{channels - 1} (--channels {channels})")


def _first_line(path) -> str:
    with open(path, "rb") as handle:
        for raw in handle:
            text = raw.decode("utf-8", errors="replace").strip()
            if text:
                return text
    return ""


def _is_pattern(text: str, channels: int | None) -> bool:
    return len(text) >= 2 and set(text) <= {"0", "1"} and (channels is None or len(text) == channels)


def tally_log(path, name: str, channels: int | None = None, log_format: str = "auto", progress=None,
              task: str = "reading", block_bytes: int = BLOCK_BYTES, block_values: int = BLOCK_VALUES) -> LogTally:
    """Count the triggers of every bitmask in one log file (see the module docstring)."""
    tally = LogTally(np.zeros(0, dtype=np.int64), {}, 0, "bitmask")
    if file_kind(path) == "npy":
        array = _open_npy(path, name)
        if array.dtype.kind not in "iu":
            raise InputFileError(f"{name}: expected integer bitmasks, got an array of dtype {array.dtype}")
        for start in range(0, array.shape[0], block_values):
            block = np.asarray(array[start:start + block_values])
            masks = block.astype(np.int64, copy=False)  # uint64 above 2^63 turn negative: refused below
            try:
                tally.add(masks)  # np.bincount refuses negative values, so no separate pass checks them
            except ValueError:
                index = start + int(np.argmax(masks < 0))
                raise InputFileError(f"{name}: index {index}: bitmask {int(array[index])} is negative or wider than "
                                     f"{MAX_CHANNELS} channels") from None
            _check_width(masks, channels, name, lambda i, s=start: f"index {s + i}")
            if progress is not None:
                progress(task, start + block.size, array.shape[0])
        _check_limit(tally, name)
        return tally
    first = _first_line(path)
    if not first:
        raise InputFileError(f"{name}: empty log (no triggers)")
    patterns = log_format == "pattern" or (log_format == "auto" and _is_pattern(first, channels))
    if patterns:
        width = len(first)
        if channels is not None and width != channels:
            raise InputFileError(f"{name}: line 1: pattern {first!r} has {width} channels, not {channels} (--channels)")
        if width > MAX_CHANNELS:
            raise InputFileError(f"{name}: patterns of {width} channels: at most {MAX_CHANNELS} are supported")
        tally.layout = "pattern"
    for first_line, block in read_lines(path, name, progress, task, block_bytes):
        if patterns:
            masks = _pattern_block(block, width, name, first_line)
        else:
            masks = _bitmask_block(block, name, first_line)
            _check_width(masks, channels, name, lambda i: _line_of(block, first_line, i))
        tally.add(masks)
    if patterns:
        tally.width = width
    _check_limit(tally, name)
    return tally


def _check_limit(tally: LogTally, name: str) -> None:
    if tally.triggers == 0:
        raise InputFileError(f"{name}: empty log (no triggers)")
    if tally.width > MAX_CHANNELS:
        raise InputFileError(f"{name}: bitmasks wider than {MAX_CHANNELS} channels")


def _line_of(block: bytes, first_line: int, index: int) -> str:
    """'line L' of the index-th non-blank line of a block."""
    seen = -1
    for offset, raw in enumerate(block.split(b"\n")):
        if raw.strip():
            seen += 1
            if seen == index:
                return f"line {first_line + offset}"
    return f"line {first_line}"


def _bad(block: bytes, first_line: int, check, name: str, what: str):
    for offset, raw in enumerate(block.split(b"\n")):
        text = raw.decode("utf-8", errors="replace").strip()
        if text and not check(text):
            raise InputFileError(f"{name}: line {first_line + offset}: {what(text)}")
    raise InputFileError(f"{name}: line {first_line}: unreadable block")


def _bitmask_block(block: bytes, name: str, first_line: int) -> np.ndarray:
    def good(text: str) -> bool:
        return text.isdigit() and int(text) < 2**63

    try:
        masks = pd.read_csv(io.BytesIO(block), header=None, names=["m"], dtype=np.int64, engine="c", na_filter=False,
                            skip_blank_lines=True, index_col=False)["m"].to_numpy()
        ok = b"," not in block and not (masks < 0).any()
    except (ValueError, OverflowError, pd.errors.ParserError):
        ok = False
    except pd.errors.EmptyDataError:
        return np.zeros(0, dtype=np.int64)
    if not ok:
        _bad(block, first_line, good, name, lambda t: f"{t!r} is not a bitmask (a whole number >= 0 below 2^63) "
             "or a 0/1 pattern like the first line")
    return masks


def _pattern_block(block: bytes, width: int, name: str, first_line: int) -> np.ndarray:
    if b"\r" in block:
        block = block.replace(b"\r\n", b"\n")
    weights = np.left_shift(np.int64(1), np.arange(width, dtype=np.int64))
    if block.endswith(b"\n") and len(block) % (width + 1) == 0:
        rows = np.frombuffer(block, dtype=np.uint8).reshape(-1, width + 1)
        chars = rows[:, :width]
        if (rows[:, width] == 10).all() and ((chars == 48) | (chars == 49)).all():
            return (chars - 48).astype(np.int64) @ weights
    lines = [raw.strip() for raw in block.split(b"\n")]
    lines = [line for line in lines if line]
    good = lambda t: len(t) == width and set(t) <= {"0", "1"}  # noqa: E731
    if not all(len(line) == width and not line.strip(b"01") for line in lines):
        _bad(block, first_line, good, name, lambda t: f"{t!r} is not a pattern of {width} characters 0/1 "
             "(the first line's width)")
    if not lines:
        return np.zeros(0, dtype=np.int64)
    chars = np.frombuffer(b"".join(lines), dtype=np.uint8).reshape(-1, width)
    return (chars - 48).astype(np.int64) @ weights
