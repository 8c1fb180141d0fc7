"""Writing a finished run: GeoTIFF layers, tables, figures and provenance.

A run's files are published as a set: each writer writes into a staging
folder inside the output folder and :func:`terrain.io.staged_outputs` moves
the complete set into place, so a failed or interrupted write leaves the
previous set (or nothing), never a mixture.

The writer only writes: summaries (feature tables, catchment tables) come
in as data frames from :mod:`terrain.summary`, figures come from
:mod:`terrain.outputs.plot`, and every file goes through :mod:`terrain.io`
(a temporary name, renamed when complete). File names come from
:mod:`terrain.outputs.manifest`; layer descriptions, units and notes from
:mod:`terrain.layers`.
"""

from __future__ import annotations

import datetime as _dt
import functools
import platform
from collections.abc import Callable
from pathlib import Path

import numpy as np

from ..io import (
    file_sha256,
    staged_outputs,
    write_csv,
    write_figure,
    write_frames,
    write_json,
    write_layer,
)
from ..layers import spec, units
from ..version import __version__
from . import plot
from .manifest import MANIFEST

__all__ = ["CAUTION", "write_credit_run", "write_catchment_run", "write_sweep", "provenance",
           "published", "READ_SETTINGS"]

# how the DEM was read, as recorded in run.json: band, box, declared nodata,
# the window of the file read, scale and offset applied, the file's own nodata
READ_SETTINGS = ("band", "bbox", "nodata", "window", "scale", "offset", "nodata_value")

CAUTION = ("Caution: cairn's layers are analysis aids, not engineering design or official flood "
           "mapping; do not use them alone to decide flood extents, drainage design or anything "
           "that can hurt someone; defer to local codes, official flood maps and licensed "
           "professionals.")


def published(command: Callable[[object], str]) -> Callable:
    """Decorate a writer ``fn(outdir, result, ...)`` so that it writes into a
    staging folder and its files are published together when it returns.
    ``command(result)`` names the manifest entry: earlier files of a
    per-outlet pattern (``{id}``) that the new set lacks are removed with the
    publication."""

    def decorate(fn):
        @functools.wraps(fn)
        def wrapper(outdir, result, *args, **kwargs):
            patterns = tuple(f.name.replace("{id}", "*") for f in MANIFEST[command(result)]
                             if "{id}" in f.name)
            with staged_outputs(outdir, replaces=patterns) as stage:
                return fn(stage, result, *args, **kwargs)
        return wrapper

    return decorate


def _now():
    return _dt.datetime.now(_dt.timezone.utc)


def provenance(result, *, input_path: str | None, command_line: str | None, created,
               parameters: dict) -> dict:
    """The ``run.json`` record common to every command."""
    dem = result.dem
    run = {
        "cairn_version": __version__, "command_line": command_line,
        "created_utc": created.isoformat(),
        "input": {"path": input_path, "sha256": file_sha256(input_path) if input_path else None,
                  "dem_checksum": result.params["dem_checksum"], "shape": list(dem.shape),
                  "crs": dem.crs, "transform": list(dem.transform),
                  "vertical_units": dem.vertical_units or "DEM units",
                  **{k: dem.meta.get(k) for k in READ_SETTINGS}},
        "parameters": {**parameters, "error_model": result.model.as_dict(),
                       "seed": result.params["seed"]},
        "defaults": result.info.get("defaults", {}),
        "realisations_done": result.n, "execution": result.info,
        "python": platform.python_version(), "caution": CAUTION,
    }
    if dem.crs is None:
        run["note"] = "no CRS: areas are in squared cell units, distances in cell units"
    return run


def _tags(result, command_line: str | None) -> dict:
    return {"cairn_version": __version__, "command_line": command_line or "",
            "realisations": result.n, "seed": result.params["seed"],
            "error_model": result.model.as_dict(), "settings": result.job.describe(),
            "caution": CAUTION}


def write_layers(outdir: Path, result, *, command_line: str | None) -> None:
    """Every layer of ``result`` as a two-band GeoTIFF named after it."""
    tags = _tags(result, command_line)
    weight = getattr(result.job, "weight", "persistence")
    for name, (est, se) in result.layers.items():
        s = spec(name)
        oid = name[len(s.name.split("{id}")[0]):] if "{id}" in s.name else None
        desc = s.description.replace("{id}", oid) if oid else s.description
        write_layer(outdir / f"{name}.tif", result.dem, est, se, name=name,
                    units=units(name, result.dem.vertical_units, weight), description=desc,
                    tags={**tags, **({"note": s.note} if s.note else {})})


@published(lambda result: result.job.kind)
def write_credit_run(outdir: str | Path, result, features, *, input_path: str | None,
                     command_line: str | None = None) -> None:
    """Write a peaks or depressions run: layers, feature tables, quick-look, run.json.

    ``features`` is a :class:`terrain.summary.features.FeatureSummary`.
    """
    out = Path(outdir)
    kind = result.job.kind
    created = _now()
    write_layers(out, result, command_line=command_line)
    gpkg, csv = (f.name for f in MANIFEST[kind] if f.name.endswith((".gpkg", ".csv")))
    write_frames(out / gpkg, features.frames)
    write_csv(out / csv, next(iter(features.frames.values())))  # by rank, as the GeoPackage
    write_figure(out / "quicklook.png", plot.feature_map(result, features))
    run = provenance(result, input_path=input_path, command_line=command_line, created=created,
                     parameters={**result.job.describe(), **features.settings})
    run.update({"features": int(len(features.table)),
                "pair_log_entries": int(result.log["birth"].size),
                "pair_log_bytes_per_entry": int(sum(np.dtype(v.dtype).itemsize
                                                    for v in result.log.values()))})
    write_json(out / "run.json", run)


@published(lambda result: "catchments")
def write_catchment_run(outdir: str | Path, result, table, *, input_path: str | None,
                        outlets_path: str | None, command_line: str | None = None) -> None:
    """Write a catchment run: probability layers, polygons and areas, map, run.json.

    ``table`` is :func:`terrain.summary.catchments.catchment_table`'s result.
    """
    out = Path(outdir)
    created = _now()
    write_layers(out, result, command_line=command_line)
    write_frames(out / "catchments.gpkg", {"catchments": table})
    write_csv(out / "catchments.csv", table)
    write_figure(out / "quicklook.png", plot.catchment_map(result))
    job = result.job
    run = provenance(result, input_path=input_path, command_line=command_line, created=created,
                     parameters={**job.describe(), "outlets_file": outlets_path})
    write_json(out / "run.json", run)


@published(lambda result: "sweep")
def write_sweep(outdir: str | Path, result, *, input_path: str | None,
                command_line: str | None = None) -> None:
    """Write ``sweep.csv``, ``kernel_sensitivity.csv``, ``sweep.png`` and ``run.json``.

    ``result`` is a :class:`terrain.sweep.SweepResult`; ``run.json`` records
    every run's error model and execution.
    """
    out = Path(outdir)
    created = _now()
    any_run = next(iter(result.runs.values()))
    write_csv(out / "sweep.csv", result.rows)
    write_csv(out / "kernel_sensitivity.csv", result.sensitivity)
    write_figure(out / "sweep.png",
                 plot.sweep_figure(result, units=any_run.dem.vertical_units or "DEM units"))
    run = provenance(any_run, input_path=input_path, command_line=command_line, created=created,
                     parameters={**result.job.describe(), "features": int(result.n_features),
                                 "top_features": result.top})
    run["parameters"].pop("error_model")
    run["defaults"] = result.defaults
    run["runs"] = [{"error_model": r.model.as_dict(), "realisations_done": r.n,
                    "execution": r.info} for r in result.runs.values()]
    run.pop("execution")
    run.pop("realisations_done")
    write_json(out / "run.json", run)
