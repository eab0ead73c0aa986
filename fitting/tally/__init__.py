"""From instrument data to a scan: pulse-height spectra and per-trigger click logs.

``probes`` reads the PROBES file; ``streams`` reads text and ``.npy`` files in bounded memory;
``lattice`` histograms a stream exactly; ``spectra`` is the pulse-height peak model and its
maximum-likelihood fit; ``pulse_heights`` turns spectra into outcome counts and a
misassignment matrix; ``click_log`` tallies click logs; ``readout`` reads and applies
``readout.json``. The public entry points are :func:`povmfit.tally_pulse_heights` and
:func:`povmfit.tally_click_log` (``povmfit.fitting.workflow.tally``).
"""
from povmfit.fitting.tally.readout import apply_readout, load_readout

__all__ = ["apply_readout", "load_readout"]
