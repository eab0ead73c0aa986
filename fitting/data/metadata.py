"""Conditions and identity of a measurement, as a datasheet states them.

Sources, later ones overriding earlier ones: a sidecar file beside the scan
(``SCAN.meta.json`` or ``SCAN.meta.toml``, read when present; in TOML the keys may sit at the
top level or in a ``[meta]`` table) and ``key=value`` pairs (the command line's ``--meta``).
Well-known keys are checked and typed; other keys are kept as text.
"""
from __future__ import annotations

import json
import math
import tomllib
from pathlib import Path

from povmfit.fitting.data.errors import ArgumentError, InputFileError

__all__ = ["KNOWN_KEYS", "metadata_for_scan", "parse_meta_pairs", "check_metadata", "sidecar_path"]

# key: (kind, unit or note); numbers must be finite and inside their range
KNOWN_KEYS = {
    "device": ("text", "device name or model"),
    "serial": ("text", "serial number"),
    "wavelength_nm": ("positive", "nm"),
    "temperature_k": ("positive", "K"),
    "bias_current_ua": ("number", "µA"),
    "overvoltage_v": ("number", "V"),
    "repetition_rate_hz": ("positive", "Hz"),
    "operator": ("text", "who measured"),
    "notes": ("text", "free text"),
}
_MAX_TEXT = 2000


def sidecar_path(scan_path) -> Path | None:
    """``SCAN.meta.json`` or ``SCAN.meta.toml`` beside the scan file, if one exists."""
    scan_path = Path(scan_path)
    for suffix in (".meta.json", ".meta.toml"):
        candidate = scan_path.with_name(scan_path.name + suffix)
        if candidate.is_file():
            return candidate
    return None


def _read_sidecar(path: Path) -> dict:
    try:
        text = path.read_text(encoding="utf-8")
        data = json.loads(text) if path.suffix == ".json" else tomllib.loads(text)
    except (OSError, UnicodeDecodeError, ValueError) as error:  # JSONDecodeError and TOMLDecodeError are ValueErrors
        raise InputFileError(f"{path}: cannot read the metadata ({str(error).splitlines()[0]})") from None
    if isinstance(data, dict) and isinstance(data.get("meta"), dict):
        data = data["meta"]
    if not isinstance(data, dict):
        raise InputFileError(f"{path}: expected an object of key: value pairs")
    return check_metadata(data, str(path))


def parse_meta_pairs(pairs) -> dict:
    """``["wavelength_nm=1550", "device=KX-3"]`` -> checked dict (the ``--meta`` option)."""
    out = {}
    for pair in pairs or ():
        key, sep, value = pair.partition("=")
        if not sep or not key.strip():
            raise ArgumentError(f"--meta {pair!r}: expected KEY=VALUE")
        out[key.strip()] = value.strip()
    return check_metadata(out, "--meta")


def check_metadata(data: dict, where: str) -> dict:
    """Well-known keys typed and range-checked; other keys kept as text. ArgumentError or
    InputFileError (a sidecar file) naming the key."""
    error = InputFileError if where not in ("--meta", "metadata") else ArgumentError
    out = {}
    for key, value in data.items():
        key = str(key)
        if not key.replace("_", "").isalnum():
            raise error(f"{where}: metadata key {key!r}: use letters, digits and underscores")
        kind = KNOWN_KEYS.get(key, ("text", ""))[0]
        if kind == "text":
            if isinstance(value, (dict, list)):
                raise error(f"{where}: metadata key {key!r}: expected text, got a {type(value).__name__}")
            text = str(value)
            if len(text) > _MAX_TEXT:
                raise error(f"{where}: metadata key {key!r}: longer than {_MAX_TEXT} characters")
            out[key] = text
            continue
        try:
            number = float(value)
        except (TypeError, ValueError):
            raise error(f"{where}: metadata key {key!r}: expected a number, got {value!r}") from None
        if not math.isfinite(number) or (kind == "positive" and number <= 0):
            raise error(f"{where}: metadata key {key!r}: expected a {'positive ' if kind == 'positive' else ''}"
                        f"finite number, got {value!r}")
        out[key] = number
    return out


def metadata_for_scan(scan_path=None, given: dict | None = None) -> dict:
    """The sidecar's metadata (when ``scan_path`` has one) updated with ``given``."""
    out = {}
    sidecar = sidecar_path(scan_path) if scan_path is not None else None
    if sidecar is not None:
        out.update(_read_sidecar(sidecar))
    if given:
        out.update(check_metadata(dict(given), "metadata"))
    return out
