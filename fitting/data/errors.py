"""povmfit's typed errors. Each message is one line: the file, row and column (or the
argument) and what is wrong. The command line prints it and exits with code 2."""
from __future__ import annotations

__all__ = [
    "PovmfitError", "ArgumentError", "InputFileError", "ScanError", "DetectorFileError", "StateError",
    "NotIdentifiable", "OutputError", "WorkerError",
]


class PovmfitError(ValueError):
    """Base of every error povmfit raises about its input."""


class ArgumentError(PovmfitError):
    """A value passed to a public function (or a command-line option) is out of its range."""


class InputFileError(PovmfitError):
    """A file given to povmfit cannot be read or has bad content."""


class ScanError(InputFileError):
    """A scan (file or arrays) is malformed."""


class DetectorFileError(InputFileError):
    """A detector file or POVM table is malformed."""


class StateError(PovmfitError):
    """An input-state description or photon-number distribution is malformed."""


class NotIdentifiable(PovmfitError):
    """The scan cannot determine the requested model (wrong outcomes, too few probe settings)."""


class FitError(PovmfitError):
    """A model cannot be fitted to the scan: its objective is not finite even at the start
    (the message names the scan and the model)."""


class OutputError(PovmfitError):
    """An output path cannot receive the results (not a folder, not writable, holds other
    results without ``overwrite``)."""


class WorkerError(PovmfitError):
    """A worker process died, hung past its time limit or could not start."""
