"""The CSV tables among the outputs: ``povm.csv`` and ``wigner.csv`` (DESIGN section 4).

The row builders and the writer live with the reconstructions
(:mod:`povmfit.fitting.tomography.tables`), which write the same files on their own; the
whole job adds its fitted model's rows (source ``model``) through the same functions. They
are re-exported here so that every output of the job is found under ``outputs``.
"""
from __future__ import annotations

from povmfit.fitting.tomography.tables import (
    POVM_COLUMNS,
    WIGNER_COLUMNS,
    csv_text,
    povm_rows,
    wigner_rows,
    write_reconstruction_csvs,
)

__all__ = ["POVM_COLUMNS", "WIGNER_COLUMNS", "csv_text", "povm_rows", "wigner_rows", "write_reconstruction_csvs"]
