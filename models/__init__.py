"""Physics of povmfit: probe states, detector stages and families, POVMs and Wigner maps.

Pure functions, no input or output. Photon numbers are mean photons per shot at the
reference plane; ``alpha`` is the complex displacement amplitude; POVMs are arrays
``theta[k, n] = P(outcome k | n photons)`` of shape (n_outcomes, n_photons).
"""
import povmfit as _povmfit  # noqa: F401  (switches JAX to float64)

from ._banded import BandedProbeMatrix, banded_probe_distributions
from ._emulate import (
    ResponseTable,
    apply_pixel_crosstalk,
    response_table,
    sample_counts,
    sample_outcomes,
    split_array_patterns,
    uniform_subset_patterns,
)
from ._families import (
    FAMILIES,
    FEATURES,
    FIXED_READOUT,
    READOUT_COLUMN_TOLERANCE,
    DetectorModel,
    check_readout_matrix,
    fixed_readout_columns,
    parse_model_spec,
)
from ._features import FEATURE_TABLE, PARAMETERS, dark_parameter_names, null_value, ranked_features
from ._povm import POVM
from ._probes import (
    choose_cutoff,
    coherent_distribution,
    displaced_thermal_distribution,
    fock_distribution,
    probe_distributions,
    probe_distributions_numpy,
    squeezed_vacuum_distribution,
    tail_mass,
    thermal_distribution,
)
from ._stages import (
    borel_crosstalk_matrix,
    click_dark_matrix,
    loss_matrix,
    pixel_crosstalk_matrix,
    poisson_dark_matrix,
    readout_matrix,
    saturation_matrix,
    split_pixel_matrix,
    uniform_pixel_matrix,
)
from ._wigner import fock_wigner_table, fock_wigner_table_numpy, povm_wigner, saturating_wigner

__all__ = [
    "FAMILIES", "FEATURES", "FEATURE_TABLE", "PARAMETERS", "dark_parameter_names", "null_value", "ranked_features",
    "DetectorModel", "parse_model_spec", "FIXED_READOUT", "READOUT_COLUMN_TOLERANCE", "check_readout_matrix",
    "fixed_readout_columns", "POVM",
    "choose_cutoff", "coherent_distribution", "displaced_thermal_distribution",
    "fock_distribution", "probe_distributions", "probe_distributions_numpy", "squeezed_vacuum_distribution", "tail_mass",
    "thermal_distribution", "borel_crosstalk_matrix", "click_dark_matrix", "loss_matrix",
    "pixel_crosstalk_matrix", "poisson_dark_matrix", "readout_matrix", "saturation_matrix",
    "split_pixel_matrix", "uniform_pixel_matrix", "fock_wigner_table", "fock_wigner_table_numpy", "povm_wigner",
    "saturating_wigner", "BandedProbeMatrix", "banded_probe_distributions", "ResponseTable",
    "apply_pixel_crosstalk", "response_table", "sample_counts", "sample_outcomes",
    "split_array_patterns", "uniform_subset_patterns",
]
