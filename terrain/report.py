"""Writing a finished run to a folder: GeoTIFF layers, feature tables, map, provenance.

Every file goes through :func:`terrain.io.atomic_path`, so an interrupted
write leaves earlier complete files or none.
"""

from __future__ import annotations

import datetime as _dt
import hashlib
import platform
from pathlib import Path

import numpy as np

from . import __version__
from .credit import LAYERS, layer_units
from .ensemble import Attribution
from .features import feature_frames, feature_table, find_features
from .io import atomic_path, write_json, write_layer, write_table

__all__ = ["outputs_for", "write_outputs", "write_catchment_outputs", "write_sweep_outputs",
           "file_sha256"]

_TABLES = {"peaks": ("peaks.gpkg", "summits.csv"), "pits": ("depressions.gpkg", "pits.csv")}
_DESCRIPTIONS = {
    "summit_credit": "mean prominence credited to the cell as a summit",
    "col_credit": "mean prominence credited to the cell as a key col",
    "summit_probability": "share of realisations in which the cell is the summit of a counted peak",
    "pit_credit": "mean depth credited to the cell as a pit",
    "spill_credit": "mean depth credited to the cell as a spill point",
    "pit_probability": "share of realisations in which the cell is the pit of a counted depression",
    "ponding_probability": "share of realisations in which the cell holds water at least the "
                           "minimum depth deep after depression filling",
}


def outputs_for(kind: str) -> list[str]:
    """File names a run of ``kind`` writes (checked before the run starts)."""
    return [f"{n}.tif" for n in LAYERS[kind]] + list(_TABLES[kind]) + ["quicklook.png", "run.json"]



def file_sha256(path: str | Path) -> str:
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        for block in iter(lambda: fh.read(1 << 20), b""):
            h.update(block)
    return h.hexdigest()


def write_outputs(outdir: str | Path, res: Attribution, *, input_path: str | None,
                  command: str, frac: float = 0.1, extra: dict | None = None) -> dict:
    """Write all outputs of a run; return the feature table (dict of arrays).

    Parameters
    ----------
    outdir : folder (already checked by :func:`terrain.io.prepare_outdir`)
    res : Attribution
    input_path : the DEM file (for provenance), or None
    command : the command that made the run (for provenance)
    frac : minimum presence (births per realisation) of a feature region
    extra : more entries for ``run.json``
    """
    out = Path(outdir)
    dem, s = res.dem, res.settings
    kind = s.kind
    t_write = _dt.datetime.now(_dt.timezone.utc)
    tags = {"cairn_version": __version__, "command": command, "realisations": res.n,
            "seed": res.params["seed"], "error_model": res.model.as_dict(),
            "threshold": s.threshold, "threshold_jitter": s.threshold_jitter, "weight": s.weight,
            "connectivity": s.connectivity, "caution": "analysis aid, not engineering design"}
    if kind == "peaks":
        tags["base"] = s.base
    for name in LAYERS[kind]:
        est, se = res.layers[name]
        write_layer(out / f"{name}.tif", dem, est, se, name=name,
                    units=layer_units(name, dem.vertical_units, s.weight),
                    description=_DESCRIPTIONS[name], tags=tags)
    main = LAYERS[kind][0]
    labels, k = find_features(res.layers[main][0], dem.nodata,
                              probability=res.layers[LAYERS[kind][2]][0], min_presence=frac)
    table = feature_table(dem, labels, k, res.layers[main][0], res.log, res.n, base=s.base)
    frames = feature_frames(dem, table, labels, kind)
    gpkg, csv = _TABLES[kind]
    write_table(out / gpkg, out / csv, frames)
    _write_quicklook(out / "quicklook.png", res, table, frames, main, labels > 0)
    run = provenance(res, input_path=input_path, command=command, created=t_write,
                     parameters={"kind": kind, **dict(s.__dict__), "feature_min_presence": frac,
                                 "feature_window_cells": 5, "feature_local_min": 0.05})
    run.update({"features": int(k), "pair_log_entries": int(res.log["birth"].size),
                "pair_log_bytes_per_entry": int(sum(np.dtype(res.log[f].dtype).itemsize
                                                    for f in res.log))})
    run.update(extra or {})
    write_json(out / "run.json", run)
    return table


def provenance(res: Attribution, *, input_path: str | None, command: str, created,
               parameters: dict) -> dict:
    """The ``run.json`` record common to every command."""
    dem = res.dem
    run = {
        "cairn_version": __version__, "command": command, "created_utc": created.isoformat(),
        "input": {"path": input_path, "sha256": file_sha256(input_path) if input_path else None,
                  "dem_checksum": res.params["dem_checksum"], "shape": list(dem.shape),
                  "crs": dem.crs, "transform": list(dem.transform),
                  "vertical_units": dem.vertical_units or "DEM units"},
        "parameters": {**parameters, "error_model": res.model.as_dict(), "seed": res.params["seed"]},
        "realisations_done": res.n, "execution": res.info,
        "python": platform.python_version(),
        "caution": "Analysis aid, not engineering design or official flood mapping; defer to "
                   "local codes, official flood maps and licensed professionals.",
    }
    if dem.crs is None:
        run["note"] = "no CRS: areas are in squared cell units, distances in cell units"
    return run


def catchment_outputs(ids) -> list[str]:
    """File names ``cairn catchments`` writes."""
    from .catchments import catchment_layer_names

    return [f"{n}.tif" for n in catchment_layer_names(ids)] + [
        "catchments.gpkg", "catchments.csv", "quicklook.png", "run.json"]


def write_catchment_outputs(outdir: str | Path, res: Attribution, *, input_path: str | None,
                            outlets_path: str | None, command: str = "catchments") -> dict:
    """Write a catchment run: probability layers, 50%/90% polygons, map, provenance.

    Returns the table (dict of lists) written to ``catchments.gpkg``/``.csv``.
    """
    import geopandas as gpd

    from .catchments import area_summary
    from .features import feature_polygons
    from .plot import quicklook

    out = Path(outdir)
    dem, job = res.dem, res.settings
    created = _dt.datetime.now(_dt.timezone.utc)
    tags = {"cairn_version": __version__, "command": command, "realisations": res.n,
            "seed": res.params["seed"], "error_model": res.model.as_dict(), "snap_m": job.snap_m,
            "caution": "analysis aid, not a flood or drainage design"}
    for name, (est, se) in res.layers.items():
        what = ("share of realisations in which the cell drains to outlet " + name.rsplit("_", 1)[1]
                if name.startswith("catchment") else
                "share of realisations in which the cell and a neighbour drain to different exits")
        write_layer(out / f"{name}.tif", dem, est, se, name=name, units="probability",
                    description=what, tags=tags)
    areas = area_summary(res.log, job.ids)
    area_row = dem.cell_area_m2()
    rows = {c: [] for c in ("outlet_id", "level", "area_m2", "area_mean_m2", "area_p05_m2",
                            "area_p95_m2")}
    geoms = []
    for oid in job.ids:
        p = res.layers[f"catchment_probability_{oid}"][0]
        for level in (0.5, 0.9):
            m = (p >= level) & ~dem.nodata
            geom = feature_polygons(dem, m.astype(np.int32), 1)[0]
            geoms.append(geom)
            rows["outlet_id"].append(oid)
            rows["level"].append(level)
            rows["area_m2"].append(float((m * area_row[:, None]).sum()))
            mean, p05, p95 = areas[oid]
            rows["area_mean_m2"].append(mean)
            rows["area_p05_m2"].append(p05)
            rows["area_p95_m2"].append(p95)
    gdf = gpd.GeoDataFrame(rows, geometry=geoms, crs=dem.crs)
    write_table(out / "catchments.gpkg", out / "catchments.csv", {"catchments": gdf})
    contours = [(res.layers[f"catchment_probability_{oid}"][0], [0.1, 0.5, 0.9], oid)
                for oid in job.ids]
    fig = quicklook(dem, res.layers["divide_probability"][0],
                    title=f"drainage-divide probability; membership contours 10% (dotted), 50%, "
                          f"90% (dashed)\n{res.n} realisations, error {res.model.describe()}",
                    units="divide probability", cmap="viridis_r", contours=contours,
                    outlets=[(x, y, oid) for oid, (x, y) in zip(job.ids, job.xy)], vmax=1.0)
    with atomic_path(out / "quicklook.png") as tmp:
        fig.savefig(tmp, format="png")
    run = provenance(res, input_path=input_path, command=command, created=created,
                     parameters={"job": "catchments", "outlets_file": outlets_path,
                                 "outlets": {i: list(map(float, xy)) for i, xy in
                                             zip(job.ids, job.xy)}, "snap_m": job.snap_m})
    write_json(out / "run.json", run)
    return rows


def _write_quicklook(dest: Path, res: Attribution, table: dict, frames: dict, main: str,
                     show: np.ndarray) -> None:
    from .plot import quicklook

    dem, s = res.dem, res.settings
    units = layer_units(main, dem.vertical_units, s.weight)
    figure = "prominence" if s.kind == "peaks" else "depth"
    order = np.argsort(table["rank"], kind="stable")[:12]
    labels = [(table["x"][i], table["y"][i],
               f"#{table['feature_id'][i]} {table['expected'][i]:.1f} · p₁ {table['p_first'][i]:.2f}")
              for i in order]
    poly = next(iter(frames.values())).geometry.tolist()
    title = (f"{main.replace('_', ' ')} — {res.n} realisations, error {res.model.describe()}"
             f"\nlabels: #id, expected {figure} ({units}), p₁ = probability of ranking first")
    fig = quicklook(dem, res.layers[main][0], title=title, units=f"{main.replace('_', ' ')} ({units})",
                    polygons=poly, labels=labels, show=show)
    with atomic_path(dest) as tmp:
        fig.savefig(tmp, format="png")


def sweep_outputs() -> list[str]:
    return ["sweep.csv", "kernel_sensitivity.csv", "sweep.png", "run.json"]


def write_sweep_outputs(outdir: str | Path, result, *, kind: str, input_path: str | None,
                        settings, rmses, kernels, command: str = "sweep") -> None:
    """Write ``sweep.csv``, ``kernel_sensitivity.csv``, ``sweep.png`` and ``run.json``."""
    import pandas as pd

    from .sweep import SENSITIVITY_COLUMNS, SWEEP_COLUMNS, sweep_figure

    out = Path(outdir)
    created = _dt.datetime.now(_dt.timezone.utc)
    any_run = next(iter(result.runs.values()))
    with atomic_path(out / "sweep.csv") as tmp:
        pd.DataFrame({c: result.rows[c] for c in SWEEP_COLUMNS}).to_csv(tmp, index=False)
    with atomic_path(out / "kernel_sensitivity.csv") as tmp:
        pd.DataFrame({c: result.sensitivity[c] for c in SENSITIVITY_COLUMNS}).to_csv(tmp, index=False)
    fig = sweep_figure(result, kind=kind, units=any_run.dem.vertical_units or "DEM units")
    with atomic_path(out / "sweep.png") as tmp:
        fig.savefig(tmp, format="png")
    run = provenance(any_run, input_path=input_path, command=command, created=created,
                     parameters={"kind": kind, **dict(settings.__dict__), "rmse_levels": list(rmses),
                                 "kernels": list(kernels), "draw": "quantile (common random numbers)",
                                 "features": int(result.n_features), "top_features": result.top})
    run["execution"] = {f"{k}@{r:g}": res.info for (k, r), res in result.runs.items()}
    write_json(out / "run.json", run)
