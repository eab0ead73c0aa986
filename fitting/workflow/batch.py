"""Many scans at once: sweeps over operating conditions and fleets of detectors, on Dask.

Data flow: manifest (``data.manifest``) -> one Dask task per scan, each the whole job of
:func:`povmfit.characterise` (``n_jobs=1``: the workers are the parallelism) followed by
``Characterisation.write`` into the scan's own folder -> one row of figures per scan ->
sweep figures per group of scans (``inference.sweeps``) -> ``figures.csv``/``.parquet``,
``sweeps.csv`` and ``batch_report.html`` (``outputs.batch_report``).

Measurement metadata: the well-known keys of ``data.metadata`` (device, serial,
wavelength_nm, ...) of each scan come from its sidecar ``SCAN.meta.json``/``.toml`` and from
the manifest's condition columns of those names, the manifest overriding the sidecar (as
``--meta`` does for ``povmfit fit``). Manifest cells are checked before any work (one line
naming the manifest, the row and the column); each scan's job gets them as ``metadata``, so its
datasheet, detector file and report carry them. The figures table gets one column per
well-known key found in some sidecar and not already a condition column (empty text or NaN
where a scan has none), after the conditions; ``sweeps.csv`` carries a key's value where every
scan of the swept group shares it.

A scan that is refused (missing or malformed file, a model the scan cannot identify) gets
status ``refused`` and its one-line reason; the others go on. Statuses: ``ok``, ``refused``,
``not_converged`` (the optimiser stopped without meeting its criteria: the outputs are
written and flagged, as ``povmfit fit`` does), and ``failed`` (an unexpected error inside
povmfit: the exception's type and message; please report it).

Schedulers: ``"local"`` starts a ``dask.distributed.LocalCluster`` of ``workers`` processes
(default: one per core available to this process), one thread each; ``"processes"`` uses
Dask's multiprocessing scheduler without a cluster; an address such as
``"tcp://host:8786"`` submits to a running cluster, whose workers must reach the scan files
and the output folder at the same paths as this process. Each worker process compiles each
model once and keeps it for its later scans.
"""
from __future__ import annotations

import math
import os
import shutil
import time
import warnings
from contextlib import contextmanager
from dataclasses import dataclass, field
from pathlib import Path

from povmfit.fitting.data.errors import ArgumentError, PovmfitError
from povmfit.fitting.data.manifest import FIGURE_NAMES, FIGURE_SUFFIXES, Manifest, load_manifest, manifest_from_frame
from povmfit.fitting.display import format_number, format_uncertain, html_block, html_table, text_table
from povmfit.fitting.data.arguments import as_calibration_uncertainty, as_model
from povmfit.fitting.data.metadata import KNOWN_KEYS, check_metadata, metadata_for_scan

__all__ = ["characterise_many", "BatchResult", "STATUSES"]

STATUSES = ("ok", "refused", "not_converged", "failed")


@dataclass(frozen=True)
class BatchResult:
    """Result of :func:`characterise_many`.

    Attributes:
        manifest: the validated :class:`~povmfit.fitting.data.manifest.Manifest`.
        rows: one dict per scan, in manifest order: ``scan``, the conditions, the well-known
            metadata keys of the scans' sidecars that are not conditions, ``status``,
            ``reason`` (one line, empty when ok), ``model`` (the chosen spec), the
            ``calibration_uncertainty`` used, for every figure ``FIGURE_value``,
            ``FIGURE_stderr``, ``FIGURE_ci95_lo``, ``FIGURE_ci95_hi`` (NaN where a scan has
            no such figure), ``efficiency_stat_stderr``, ``efficiency_calibration_stderr``,
            ``gof_p_value``, ``deviance``, ``dof``, ``cross_check`` (its verdict),
            ``output`` (the scan's folder relative to ``out_dir``) and ``seconds``.
        sweeps: one dict per group of scans swept in ``bias`` (the other conditions fixed):
            the group's conditions, ``metadata`` (the well-known keys every scan of the group
            shares; empty text or NaN otherwise), ``bias_column``, ``scans`` and the figures of
            ``inference.sweeps`` (plateau ``start``, ``end``, ``width``, ``efficiency``;
            ``dark_limit_bias`` with a dark limit); empty without a bias condition.
        options: the batch options (model, calibration_uncertainty, gate_duration_s,
            plateau, dark_limit, bias, seed, scheduler, workers).
        out_dir: the output folder, or None when nothing was written.
        files: {name: Path} of the batch-level files written.
    """

    manifest: Manifest
    rows: tuple
    sweeps: tuple
    options: dict
    out_dir: Path | None = None
    files: dict = field(default_factory=dict)

    def count(self, status: str) -> int:
        return sum(row["status"] == status for row in self.rows)

    @property
    def refused(self) -> list[dict]:
        """The rows of the scans that were refused."""
        return [row for row in self.rows if row["status"] == "refused"]

    def to_dataframe(self):
        """The figures table (``figures.csv``): one row per scan, columns as in ``rows``."""
        import pandas as pd

        return pd.DataFrame(list(self.rows), columns=table_columns(self.manifest, self.rows))

    def sweeps_dataframe(self):
        """The sweep figures (``sweeps.csv``): one row per swept group, flat columns."""
        import pandas as pd

        return pd.DataFrame([_flat_sweep(s) for s in self.sweeps])

    def write(self, out_dir) -> dict:
        """Write figures.csv, figures.parquet, sweeps.csv and batch_report.html into ``out_dir``
        (each atomically); the per-scan folders are written by the batch itself."""
        from povmfit.fitting.outputs.batch_report import write_batch_outputs

        return write_batch_outputs(self, Path(out_dir))

    def summary(self) -> str:
        """Plain text: counts by status, the efficiency per scan, sweep figures, refusals."""
        counts = ", ".join(f"{self.count(s)} {s}" for s in STATUSES if self.count(s))
        lines = [f"batch of {len(self.rows)} scans from {self.manifest.source}: {counts}", ""]
        names = list(self.manifest.conditions)
        table = [[row["scan"], *[format_number(row[c]) for c in names], row["status"], row["model"] or "-",
                  format_uncertain(row["efficiency_value"], row["efficiency_stderr"]),
                  format_uncertain(row["vacuum_click_probability_value"], row["vacuum_click_probability_stderr"])]
                 for row in self.rows]
        lines.append(text_table(["scan", *names, "status", "model", "efficiency", "vacuum click p"], table))
        for sweep in self.sweeps:
            lines += ["", _sweep_line(sweep)]
        for row in self.rows:
            if row["status"] != "ok":
                lines.append(f"{row['status']}: {row['scan']}: {row['reason']}")
        return "\n".join(lines)

    def _repr_html_(self) -> str:
        counts = ", ".join(f"{self.count(s)} {s}" for s in STATUSES if self.count(s))
        names = list(self.manifest.conditions)
        table = [[row["scan"], *[format_number(row[c]) for c in names], row["status"], row["model"] or "-",
                  format_uncertain(row["efficiency_value"], row["efficiency_stderr"]), row["reason"]]
                 for row in self.rows]
        return html_block(f"Batch of {len(self.rows)} scans ({counts})", [_sweep_line(s) for s in self.sweeps],
                          [html_table(["scan", *names, "status", "model", "efficiency", "reason"], table)])

    def to_dict(self) -> dict:
        """Plain JSON-able data: options, rows, sweeps and the files written."""
        return {"manifest": self.manifest.source, "conditions": list(self.manifest.conditions),
                "numeric_conditions": list(self.manifest.numeric),
                "metadata_columns": metadata_columns(self.manifest, self.rows), "options": dict(self.options),
                "rows": [dict(row) for row in self.rows], "sweeps": [dict(s) for s in self.sweeps],
                "files": {k: str(v) for k, v in self.files.items()}}


def table_columns(manifest: Manifest, rows) -> list[str]:
    """Column order of the figures table; figure groups only for figures some scan has."""
    present = [name for name in FIGURE_NAMES if any(not _nan(row.get(f"{name}_value")) for row in rows)]
    present = present or ["efficiency", "vacuum_click_probability"]
    figures = [f"{name}_{suffix}" for name in present for suffix in FIGURE_SUFFIXES]
    return (["scan", *manifest.conditions, *metadata_columns(manifest, rows), "status", "reason", "model",
             "calibration_uncertainty", *figures, "efficiency_stat_stderr", "efficiency_calibration_stderr",
             "gof_p_value", "deviance", "dof", "cross_check", "output", "seconds"])


def metadata_columns(manifest: Manifest, rows) -> list[str]:
    """The well-known metadata keys (in ``KNOWN_KEYS`` order) some row carries that are not
    condition columns of the manifest: the figures table's metadata columns."""
    return [key for key in KNOWN_KEYS if key not in manifest.conditions and any(key in row for row in rows)]


def _metadata_blank(key: str):
    """The empty cell of a metadata column: '' for a text key, NaN for a number."""
    return "" if KNOWN_KEYS[key][0] == "text" else math.nan


def _same(a, b) -> bool:
    return a == b or (_nan(a) and _nan(b))


def _nan(value) -> bool:
    return value is None or (isinstance(value, float) and math.isnan(value))


def _sweep_line(sweep: dict) -> str:
    group = ", ".join(f"{k} {v}" for k, v in sweep["group"].items()) or "all scans"
    parts = [f"sweep of {sweep['bias_column']} ({group}, {sweep['scans']} scans):"]
    if "start" in sweep:
        start, end = sweep["start"], sweep["end"]
        parts.append(f"plateau from {format_uncertain(start['value'], start['stderr'])}"
                     f"{' (open)' if start.get('open') else ''} to {format_uncertain(end['value'], end['stderr'])}"
                     f"{' (open)' if end.get('open') else ''}, efficiency "
                     f"{format_uncertain(sweep['efficiency']['value'], sweep['efficiency']['stderr'])}")
    if "dark_limit_bias" in sweep:
        crossing = sweep["dark_limit_bias"]
        value = (crossing.get("note") if _nan(crossing["value"])
                 else format_uncertain(crossing["value"], crossing["stderr"]))
        parts.append(f"dark limit {crossing['limit']:g} reached at {value}")
    if sweep.get("note"):
        parts.append(sweep["note"])
    return parts[0] + " " + "; ".join(parts[1:])


def _flat_sweep(sweep: dict) -> dict:
    out = {**sweep["group"], **sweep.get("metadata", {}), "bias_column": sweep["bias_column"], "scans": sweep["scans"]}
    for name in ("start", "end", "width", "efficiency", "dark_limit_bias"):
        figure = sweep.get(name)
        if figure is None:
            continue
        prefix = f"plateau_{name}" if name != "dark_limit_bias" else name
        out.update({f"{prefix}_value": figure["value"], f"{prefix}_stderr": figure["stderr"],
                    f"{prefix}_ci95_lo": figure["ci95"][0], f"{prefix}_ci95_hi": figure["ci95"][1]})
        if "open" in figure:
            out[f"{prefix}_open"] = figure["open"]
    out["plateau_fraction"] = sweep.get("plateau_fraction")
    out["dark_limit"] = sweep.get("dark_limit_bias", {}).get("limit")
    out["note"] = sweep.get("note") or ""
    return out


# ----- the task run on a worker -------------------------------------------------------------
_PREPARED: set = set()


def run_scan(job: dict) -> dict:
    """The whole job on one scan, as ``povmfit fit`` does it, inside a worker; returns the
    scan's row of the figures table. Never raises: refusals and errors become the status."""
    setup = job.get("worker_setup")
    if setup is not None and id(setup) not in _PREPARED:
        setup()
        _PREPARED.add(id(setup))
    from povmfit.fitting.inference.result import FitNotConverged
    from povmfit.fitting.workflow.characterise import characterise

    started = time.perf_counter()
    row = _empty_row(job)
    try:
        # the sidecar's metadata merged with the manifest's, read first so that a refused scan keeps it
        known = {k: v for k, v in metadata_for_scan(job["path"], job["metadata"]).items() if k in KNOWN_KEYS}
        row.update({k: v for k, v in known.items() if k not in job["conditions"]})
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", FitNotConverged)
            result = characterise(job["path"], job["model"], calibration_uncertainty=job["calibration_uncertainty"],
                                  gate_duration=job["gate_duration"], seed=job["seed"], n_jobs=1,
                                  metadata=job["metadata"])
        if job["out_dir"] is not None:
            folder = Path(job["out_dir"]) / job["output"]
            if folder.is_dir():  # only with overwrite: a batch's folder is checked empty before it starts
                shutil.rmtree(folder)
            result.write(folder, report=job["report"])
        row.update(_result_row(result))
    except PovmfitError as error:
        row.update(status="refused", reason=" ".join(str(error).split()))
    except Exception as error:  # noqa: BLE001  (one scan's crash must not stop the batch)
        row.update(status="failed", reason=" ".join(f"{type(error).__name__}: {error}".split()))
    row["seconds"] = time.perf_counter() - started
    return row


def _empty_row(job: dict) -> dict:
    row = {"scan": job["scan"], **job["conditions"], "status": "ok", "reason": "", "model": "",
           "calibration_uncertainty": job["calibration_uncertainty"] or 0.0}
    for name in FIGURE_NAMES:
        row.update({f"{name}_{suffix}": math.nan for suffix in FIGURE_SUFFIXES})
    row.update(efficiency_stat_stderr=math.nan, efficiency_calibration_stderr=math.nan, gof_p_value=math.nan,
               deviance=math.nan, dof=math.nan, cross_check="", output="", seconds=math.nan)
    return row


def _result_row(result) -> dict:
    sheet = result.datasheet()
    row = {"model": sheet["model"]["spec"], "output": "", "cross_check": sheet["cross_check"].get("verdict", "")}
    for name, figure in sheet["figures"].items():
        if name in FIGURE_NAMES:
            row.update({f"{name}_value": figure["value"], f"{name}_stderr": figure["stderr"],
                        f"{name}_ci95_lo": figure["ci95"][0], f"{name}_ci95_hi": figure["ci95"][1]})
    efficiency = sheet["figures"]["efficiency"]
    row["efficiency_stat_stderr"] = efficiency.get("stat_stderr", math.nan)
    row["efficiency_calibration_stderr"] = efficiency.get("calibration_stderr", math.nan)
    gof = sheet["goodness_of_fit"]
    row.update(gof_p_value=gof["p_value"], deviance=gof["deviance"], dof=gof["dof"])
    if not gof["converged"]:
        row.update(status="not_converged", reason=f"the fit of {row['model']} did not converge (outputs written, flagged)")
    return row


# ----- schedulers -----------------------------------------------------------------------------
def available_cores() -> int:
    """Cores this process may run on (the default number of local workers)."""
    try:
        return len(os.sched_getaffinity(0))
    except AttributeError:  # not on every platform
        return os.cpu_count() or 1


def _check_scheduler(scheduler, workers):
    if not isinstance(scheduler, str) or not (scheduler in ("local", "processes") or "://" in scheduler):
        raise ArgumentError(f"scheduler: expected 'local', 'processes' or a scheduler address such as "
                            f"tcp://host:8786, got {scheduler!r}")
    if workers is not None and (isinstance(workers, bool) or not isinstance(workers, int) or workers < 1):
        raise ArgumentError(f"workers: expected a whole number >= 1, got {workers!r}")
    if workers is not None and "://" in scheduler:
        raise ArgumentError("workers: a running cluster has its own workers; only used with 'local' or 'processes'")


_THREAD_VARIABLES = ("OMP_NUM_THREADS", "MKL_NUM_THREADS", "OPENBLAS_NUM_THREADS")


def local_cluster(n_workers: int | None = None):
    """A ``dask.distributed.LocalCluster`` of ``n_workers`` processes (default: one per core
    available), one Dask thread each, no dashboard.

    Dask's nanny normally pins the numerical libraries of its workers to one thread
    (OMP/MKL/OpenBLAS); that changes the summation order of their linear algebra and so the
    last digits of some results. The workers here keep this process's settings, so that a
    scan gives in the batch exactly what ``povmfit fit`` gives on the same machine.
    """
    import logging

    import dask
    from dask.distributed import LocalCluster

    key = "distributed.nanny.pre-spawn-environ"
    environ = {k: v for k, v in (dask.config.get(key, None) or {}).items() if k not in _THREAD_VARIABLES}
    with dask.config.set({key: environ}):
        return LocalCluster(n_workers=n_workers or available_cores(), threads_per_worker=1, processes=True,
                            dashboard_address=None, silence_logs=logging.ERROR)


@contextmanager
def _client(scheduler: str, workers: int | None):
    """A dask.distributed Client for 'local' (a LocalCluster we start and stop) or an address."""
    from dask.distributed import Client

    if scheduler == "local":
        with local_cluster(workers) as cluster, Client(cluster) as client:
            yield client
    else:
        try:
            client = Client(scheduler, timeout="20s")
        except (OSError, TimeoutError) as error:
            raise ArgumentError(f"scheduler: cannot reach {scheduler}: {' '.join(str(error).split())}") from None
        with client:
            yield client


def _run_distributed(jobs, scheduler, workers, progress) -> list[dict]:
    from dask.distributed import as_completed

    with _client(scheduler, workers) as client:
        futures = [client.submit(run_scan, job, key=f"povmfit-scan-{i}-{os.getpid()}-{time.time_ns()}", pure=False)
                   for i, job in enumerate(jobs)]
        index = {future.key: i for i, future in enumerate(futures)}
        rows: list = [None] * len(jobs)
        for done, future in enumerate(as_completed(futures), start=1):
            rows[index[future.key]] = future.result()
            if progress is not None:
                progress("scans", done, len(jobs))
        return rows


def _run_processes(jobs, workers, progress) -> list[dict]:
    import dask
    from dask.callbacks import Callback

    class _Counter(Callback):
        def __init__(self):
            super().__init__()
            self.done = 0

        def _posttask(self, key, result, dsk, state, worker_id):
            self.done += 1
            if progress is not None:
                progress("scans", self.done, len(jobs))

    tasks = [dask.delayed(run_scan, pure=False)(job) for job in jobs]
    with _Counter():
        return list(dask.compute(*tasks, scheduler="processes", num_workers=workers or available_cores()))


# ----- the entry point ------------------------------------------------------------------------
def characterise_many(manifest, out_dir=None, *, model="auto", calibration_uncertainty=None, gate_duration=None,
                      bias=None, plateau: float = 0.01, dark_limit=None, seed: int = 0, report: bool = True,
                      overwrite: bool = False,
                      scheduler: str = "local", workers: int | None = None, worker_setup=None,
                      progress=None) -> BatchResult:
    """Characterise every scan of a manifest on Dask and collect the figures.

    Args:
        manifest: the path of a manifest file (CSV or Parquet; see ``data.manifest``) or a
            pandas DataFrame (scan paths relative to the current folder).
        out_dir: folder for the outputs: ``scans/NAME/`` per scan (what ``povmfit fit``
            writes), ``figures.csv``, ``figures.parquet``, ``sweeps.csv``,
            ``batch_report.html``. None writes nothing.
        model, calibration_uncertainty: defaults for the rows without their own ``model`` /
            ``calibration_uncertainty`` cell (as in :func:`povmfit.characterise`).
        gate_duration: gate duration in seconds (dark count rates).
        bias: the numeric condition that is a bias current; None picks the one numeric
            condition whose name contains "bias" (none: no sweep figures).
        plateau: the plateau's relative distance below the maximum efficiency (0 < p < 0.5).
        dark_limit: vacuum click probability whose crossing bias is reported (None: not).
        seed: seed of every scan's job (as ``povmfit fit --seed``) and of the sweep draws.
        report: write each scan's report.html and plots, and the batch report.
        overwrite: an ``out_dir`` that already holds files is refused before any work unless
            True; then every scan's folder and the batch files are replaced (other files stay).
        scheduler: "local", "processes" or a scheduler address; workers: processes for
            "local"/"processes" (default: the cores available).
        worker_setup: optional picklable function run once in each worker process before
            its first scan (the command line switches on JAX's compilation cache there).
        progress: optional callback ``progress(task, done, total)``, once per finished scan.
    """
    manifest = _as_manifest(manifest)
    _check_scheduler(scheduler, workers)
    model = _as_model_option(model)
    calibration_uncertainty = as_calibration_uncertainty(calibration_uncertainty)
    if gate_duration is not None and not (isinstance(gate_duration, (int, float)) and gate_duration > 0):
        raise ArgumentError(f"gate_duration: expected a positive number of seconds, got {gate_duration!r}")
    if isinstance(plateau, bool) or not isinstance(plateau, (int, float)) or not 0 < plateau < 0.5:
        raise ArgumentError(f"plateau: expected a fraction of the maximum efficiency above 0 and below 0.5, got {plateau!r}")
    if dark_limit is not None and not (isinstance(dark_limit, (int, float)) and 0 < dark_limit < 1):
        raise ArgumentError(f"dark_limit: expected a vacuum click probability between 0 and 1, got {dark_limit!r}")
    if isinstance(seed, bool) or not isinstance(seed, int) or seed < 0:
        raise ArgumentError(f"seed: expected a whole number >= 0, got {seed!r}")
    bias = _bias_column(manifest, bias)
    row_metadata = manifest_metadata(manifest)
    out = None if out_dir is None else Path(out_dir)
    if out is not None and out.exists() and (not out.is_dir() or (any(out.iterdir()) and not overwrite)):
        raise ArgumentError(f"out_dir: {out} " + ("is not a folder" if not out.is_dir() else
                            "already holds files (other results?); give overwrite=True (--overwrite) to replace "
                            "the batch's results, or choose another folder"))
    folders = _folders(manifest)
    jobs = [{"scan": row.scan, "path": str(row.path), "conditions": row.conditions,
             "model": row.model or model, "seed": seed, "gate_duration": gate_duration, "metadata": row_metadata[i],
             "calibration_uncertainty": row.calibration_uncertainty if row.calibration_uncertainty is not None
             else calibration_uncertainty, "out_dir": None if out is None else str(out.resolve()),
             "output": folders[i], "report": report, "worker_setup": worker_setup}
            for i, row in enumerate(manifest.rows)]
    if scheduler == "processes":
        rows = _run_processes(jobs, workers, progress)
    else:
        rows = _run_distributed(jobs, scheduler, workers, progress)
    extra = metadata_columns(manifest, rows)
    for row, folder in zip(rows, folders):
        row.update({key: _metadata_blank(key) for key in extra if key not in row})
        row["calibration_uncertainty"] = row["calibration_uncertainty"] or 0.0
        row["output"] = folder if out is not None and row["status"] in ("ok", "not_converged") else ""
    options = {"model": model, "calibration_uncertainty": calibration_uncertainty, "gate_duration_s": gate_duration,
               "plateau": float(plateau), "dark_limit": dark_limit, "bias": bias, "seed": seed,
               "scheduler": scheduler, "workers": workers}
    sweeps = tuple(sweep_figures(manifest, rows, bias, plateau, dark_limit, seed)) if bias else ()
    result = BatchResult(manifest=manifest, rows=tuple(rows), sweeps=sweeps, options=options, out_dir=out)
    if out is not None:
        from povmfit.fitting.outputs.batch_report import write_batch_outputs

        files = write_batch_outputs(result, out, report=report)
        result = BatchResult(manifest=manifest, rows=result.rows, sweeps=sweeps, options=options, out_dir=out, files=files)
    return result


def manifest_metadata(manifest: Manifest) -> list[dict]:
    """Per row, the manifest's condition cells whose column is a well-known metadata key,
    checked as metadata (InputFileError naming the manifest, the row and the column)."""
    known = [name for name in manifest.conditions if name in KNOWN_KEYS]
    return [check_metadata({name: _metadata_cell(row.conditions[name], name) for name in known},
                           f"{manifest.source}: {row.place}") for row in manifest.rows]


def _metadata_cell(value, name: str):
    """A manifest cell as metadata: a whole number read into a text key loses its '.0'."""
    if KNOWN_KEYS[name][0] == "text" and isinstance(value, float) and value.is_integer():
        return str(int(value))
    return value


def _as_manifest(manifest) -> Manifest:
    if isinstance(manifest, Manifest):
        return manifest
    if isinstance(manifest, (str, os.PathLike)):
        return load_manifest(manifest)
    if type(manifest).__name__ == "DataFrame":
        return manifest_from_frame(manifest)
    raise ArgumentError(f"manifest: expected the path of a manifest file or a pandas DataFrame, got {type(manifest).__name__}")


def _as_model_option(model) -> str:
    if isinstance(model, str) and model.strip().lower() == "auto":
        return "auto"
    return as_model(model).spec


def _bias_column(manifest: Manifest, bias) -> str | None:
    if bias is not None:
        if bias not in manifest.conditions:
            raise ArgumentError(f"bias: {bias!r} is not a condition column of {manifest.source} "
                                f"(columns: {', '.join(manifest.conditions) or 'none'})")
        if bias not in manifest.numeric:
            raise ArgumentError(f"bias: the condition {bias!r} holds text, not numbers")
        return bias
    found = [name for name in manifest.numeric if "bias" in name.lower()]
    if len(found) > 1:
        raise ArgumentError(f"bias: several conditions look like a bias ({', '.join(found)}): name the one swept")
    return found[0] if found else None


def _folders(manifest: Manifest) -> list[str]:
    """Output folder of each scan, relative to the batch folder: scans/STEM, with the row's
    position added where two scans share a stem."""
    stems = [Path(row.scan).stem for row in manifest.rows]
    return [f"scans/{stem}" if stems.count(stem) == 1 else f"scans/{stem}-{i + 1}" for i, stem in enumerate(stems)]


def shared_metadata(members, keys) -> dict:
    """{key: the value every member shares, or the blank cell where they differ}."""
    return {key: members[0][key] if all(_same(m[key], members[0][key]) for m in members) else _metadata_blank(key)
            for key in keys}


def sweep_figures(manifest: Manifest, rows, bias: str, plateau: float, dark_limit, seed: int):
    """Plateau and dark-limit figures per group of ok scans sharing every other condition."""
    from povmfit.fitting.inference.sweeps import dark_limit_crossing, plateau as plateau_figures

    others = [c for c in manifest.conditions if c != bias]
    groups: dict = {}
    for row in rows:
        if row["status"] == "ok":
            groups.setdefault(tuple(row[c] for c in others), []).append(row)
    extra = metadata_columns(manifest, rows)
    for key, members in groups.items():
        sweep = {"group": dict(zip(others, key)), "metadata": shared_metadata(members, extra), "bias_column": bias,
                 "scans": len(members), "plateau_fraction": float(plateau)}
        values = [m[bias] for m in members]
        if len(members) < 2 or len(set(values)) < len(values):
            sweep["note"] = ("fewer than two scans: no sweep figures" if len(members) < 2
                             else "a bias value repeats within the group: no sweep figures")
            yield sweep
            continue
        efficiency = [m["efficiency_value"] for m in members]
        stat = [m["efficiency_stat_stderr"] if not _nan(m["efficiency_stat_stderr"]) else m["efficiency_stderr"]
                for m in members]
        sweep.update(plateau_figures(values, efficiency, stat, plateau, seed=seed))
        if dark_limit is not None:
            sweep["dark_limit_bias"] = dark_limit_crossing(
                values, [m["vacuum_click_probability_value"] for m in members],
                [m["vacuum_click_probability_stderr"] for m in members], dark_limit, seed=seed)
        yield sweep
