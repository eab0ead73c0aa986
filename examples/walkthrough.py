# %% [markdown]
# # A detector characterised from Python, step by step
#
# A notebook-style walk through povmfit's library (the cells run as a plain script too:
# `python examples/walkthrough.py`). The data are the bundled example scan: **simulated**
# counts of an invented eight-bin time-multiplexed click detector, the "Marlow TM-8" of the
# (invented) Fenwick Institute, probed with coherent and displaced-thermal light. The group
# quotes a 3 % (1 sigma) calibration of its probe photon numbers and a 100 ns gate.

# %%
import tempfile

import povmfit

scan = povmfit.load_scan(povmfit.demo_scan_path())  # a path works wherever a scan is asked for
print(scan.summary())

# %% [markdown]
# ## The whole job in one call
# `characterise` ranks the candidate models, fits the chosen one, reconstructs the POVM and
# the Wigner values without a model, and cross-checks the fit against them.
# `n_jobs=2` would compute the model-free POVM in a second process meanwhile.

# %%
result = povmfit.characterise(scan, calibration_uncertainty=0.03, gate_duration=100e-9, n_jobs=1)
print(result.summary())
figures = result.to_dataframe()  # one row per datasheet figure
print(figures)

# %% [markdown]
# ## The fit, its parameters and the ranking
# `result.fit` is a `FitResult`; `params` gives lmfit Parameters (values, bounds, stderr,
# correlations) for readers used to lmfit's report.

# %%
fit = result.fit
print(fit.summary())
print(fit.params["efficiency"].value, fit.params["efficiency"].stderr)
print(result.comparison.summary())

# %% [markdown]
# ## One model, without the ranking
# The same fit for a model named by its spec; probes taken as exact this time, so the
# efficiency's uncertainty is the statistical part only.

# %%
exact = povmfit.fit(scan, "array:8+dark+crosstalk")
print(f"efficiency {exact.values['efficiency']:.4f} ± {exact.stderr['efficiency']:.4f} (statistical only)")

# %% [markdown]
# ## An emulated detector
# The fitted detector samples outcomes for any input state, e.g. a coherent state of two
# photons on average.

# %%
detector = povmfit.Emulator.from_record(fit.to_detector(gate_duration_s=100e-9))
counts = detector.sample("coherent:2.0", 100_000, seed=1)
print("outcome counts for coherent:2.0 ->", counts.tolist())

# %% [markdown]
# ## Files for the lab
# `write` puts the datasheet, the detector file, the POVM and Wigner tables and the HTML
# report into one folder.

# %%
with tempfile.TemporaryDirectory() as folder:
    files = result.write(folder)
    print("wrote", ", ".join(sorted(path.name for path in files.values() if path.parent.name != "plots")))
