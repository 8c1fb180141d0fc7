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
:mod:`terrain.layers`; the precision of each CSV column from its kind
(:mod:`terrain.outputs.tables`). ``run.json`` records how long writing took
(``timings``).
"""

from __future__ import annotations

import contextlib
import datetime as _dt
import functools
import math
import platform
import time
from collections.abc import Callable
from pathlib import Path

import numpy as np

from ..io import (
    file_sha256,
    staged_names,
    staged_outputs,
    write_csv,
    write_figure,
    write_frames,
    write_json,
    write_layer,
    write_layers_by_window,
)
from ..layers import DRAINAGE_NOTE, layer_windows, read_window, spec, units
from ..pairlog import LOG_FIELDS
from ..summary.catchments import FRAME_COLUMN_KINDS
from ..summary.features import COLUMN_KINDS, FeatureSummary
from ..summary.ranks import RANK_COLUMN_KINDS
from ..summary.relations import LINK_COLUMN_KINDS, LINK_CSV
from ..version import __version__
from . import plot, sweepchart
from .beside import in_a_copy, plain_text, write_beside
from .caution import CAUTION
from .manifest import MANIFEST, VECTOR_LAYERS, every_output, replace_patterns
from .tables import rounded

__all__ = ["CAUTION", "write_credit_run", "write_catchment_run", "write_sweep", "provenance",
           "vector_descriptions", "published", "READ_SETTINGS", "plain_text",
           "vertical_unit_record", "write_record"]

# how the DEM was read, as recorded in run.json: band, box, declared nodata,
# the window of the file read, scale and offset applied, the file's own nodata
READ_SETTINGS = ("band", "bbox", "nodata", "window", "scale", "offset", "nodata_value")


def published(command: Callable[[object], str]) -> Callable:
    """Decorate a writer ``fn(outdir, result, ...)`` so that it writes into a
    staging folder and its files are published together when it returns.
    ``command(result)`` names the manifest entry: earlier files of a
    per-outlet pattern (``{id}``) that the new set lacks are removed with the
    publication, and so are the files of the run published there before
    (its ``run.json`` lists them: :func:`write_record`) that the new set
    lacks, whichever command wrote them: a folder holds one run."""

    def decorate(fn):
        @functools.wraps(fn)
        def wrapper(outdir, result, *args, **kwargs):
            with staged_outputs(outdir, replaces=replace_patterns(command(result)),
                                earlier=every_output()) as stage:
                return fn(stage, result, *args, **kwargs)
        return wrapper

    return decorate


def _now():
    return _dt.datetime.now(_dt.timezone.utc)


def write_record(out: Path, run: dict) -> None:
    """Write ``run.json`` into the staging folder ``out``, last: its ``outputs`` list
    every file of the set (itself included), which the next run published into the
    folder removes where its own set lacks them."""
    run["outputs"] = sorted(set(staged_names(out)) | {"run.json"})
    write_json(out / "run.json", run)


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
                  **vertical_unit_record(dem),
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


def vertical_unit_record(dem) -> dict:
    """What ``run.json`` says of the vertical unit: the unit, where it came from,
    metres per unit (exact), and what the file declared."""
    return {"vertical_unit": dem.vertical_unit, "vertical_unit_source": dem.vertical_unit_source,
            "metres_per_vertical_unit": dem.metres_per_unit,
            "vertical_unit_declared": dem.vertical_units}


def _tags(result, command_line: str | None) -> dict:
    return {"cairn_version": __version__, "command_line": command_line or "",
            "vertical_unit": result.dem.unit_label,
            "realisations": result.n, "seed": result.params["seed"],
            "error_model": result.model.as_dict(), "settings": result.job.describe(),
            "caution": CAUTION}


class _Clock:
    """Wall time of each writing step, for ``run.json``'s ``timings``.

    Steps may overlap (a step may run in a forked copy while this process
    does another, :mod:`terrain.outputs.beside`), so the writing's own wall
    time is kept too.
    """

    def __init__(self):
        self.seconds: dict[str, float] = {}
        self.span = [math.inf, -math.inf]  # first start, last end of any step
        self.forked: list[str] = []  # the files a forked copy wrote
        self.fell_back: list[str] = []  # steps a copy did not do, done here instead

    @contextlib.contextmanager
    def __call__(self, step: str):
        t0 = time.perf_counter()
        self.span[0] = min(self.span[0], t0)
        try:
            yield
        finally:
            t1 = time.perf_counter()
            self.seconds[step] = self.seconds.get(step, 0.0) + t1 - t0
            self.span[1] = max(self.span[1], t1)

    def record(self, step: str, seconds: float, start: float, end: float, *,
               files: tuple[str, ...] = ()) -> None:
        """Add ``seconds`` of ``step`` done in a forked copy of this process
        between ``start`` and ``end`` (this process's ``time.perf_counter``);
        ``files``: what it wrote (``timings``' ``forked``)."""
        self.seconds[step] = self.seconds.get(step, 0.0) + seconds
        self.span = [min(self.span[0], start), max(self.span[1], end)]
        self.forked += list(files)

    def timings(self, realisations_s: float) -> dict:
        """Seconds per step and the shares of the run's wall time.

        The run's wall time is the realisations' plus the writing's (reading
        the DEM and summarising are left out, so the shares are upper bounds);
        ``layers`` is the GeoTIFFs, ``tables`` the GeoPackage and CSV files,
        ``figures`` drawing and saving the PNGs (in both processes when one
        is drawn in a forked copy; ``forked`` names what a copy wrote,
        ``forked_failed`` the steps a copy did not finish, done here instead),
        ``summary`` the feature summary when it was made within the writing
        (its first step while the layers were written, its second while the
        map was drawn); ``writing`` is the wall time from the first step's
        start to the last one's end, less the summary's (less than the
        steps' sum when they overlap).
        """
        # a summary made while the layers were written or the map drawn is not
        # writing: only the wall time writing added to it counts
        writing = max(self.span[1] - self.span[0] - self.seconds.get("summary", 0.0), 0.0) \
            if self.seconds else 0.0
        run = realisations_s + writing
        out = {"realisations_s": round(realisations_s, 3)}
        out.update({f"{k}_s": round(v, 3) for k, v in self.seconds.items()})
        out.update({"writing_s": round(writing, 3), "run_s": round(run, 3),
                    "writing_share": round(writing / run, 4) if run > 0 else None})
        if self.forked:
            out["forked"] = self.forked
        if self.fell_back:
            out["forked_failed"] = self.fell_back
        if "layers" in self.seconds:
            out["layers_share"] = round(self.seconds["layers"] / run, 4) if run > 0 else None
        return out


def write_layers(outdir: Path, result, *, command_line: str | None) -> None:
    """Every layer of ``result`` as a Cloud Optimized GeoTIFF named after it (its bands
    as its spec in :mod:`terrain.layers` says: estimate and standard error, or the
    drainage area's median, 5% and 95%)."""
    tags = _tags(result, command_line)
    weight = getattr(result.job, "weight", "persistence")
    full = dict(zip(getattr(result.job, "layer_ids", ()), getattr(result.job, "ids", ())))
    describe = {}
    for name in result.layers.keys():
        s = spec(name)
        oid = name[len(s.name.split("{id}")[0]):] if "{id}" in s.name else None
        desc = s.description.replace("{id}", full.get(oid, oid)) if oid else s.description
        describe[name] = dict(units=units(name, result.dem.unit_label, weight),
                              description=desc, note=s.note, roles=s.bands,
                              tags={**tags, **({"note": s.note} if s.note else {})})
    if result.layout.on_disk:  # out of core: every layer written window by window
        write_layers_by_window({n: outdir / f"{n}.tif" for n in describe}, result.dem,
                               functools.partial(read_window, result.layers),
                               layer_windows(result.dem.shape), describe)
        return
    for name, bands in result.layers.items():
        write_layer(outdir / f"{name}.tif", result.dem, *bands, name=name, **describe[name])


def vector_descriptions(result, names, *, note: str = "") -> dict:
    """``gpkg_contents.description`` of each GeoPackage layer in ``names``.

    What the layer is (:data:`~terrain.outputs.manifest.VECTOR_LAYERS`), the
    error model and realisations, the layer's note (if any) and the caution.
    """
    model = (f"Error model: {result.model.describe(result.dem.unit_label)}; prominences, depths "
             f"and elevations in {result.dem.unit_label}, areas in m², volumes in m³; "
             f"{result.n} realisations, seed {result.params['seed']}.")
    extra = f" It {note}." if note else ""
    return {n: f"{VECTOR_LAYERS.get(n, n)}. {model}{extra} {CAUTION}" for n in names}


@published(lambda result: result.job.kind)
def write_credit_run(outdir: str | Path, result, features, *, input_path: str | None,
                     command_line: str | None = None) -> FeatureSummary:
    """Write a peaks or depressions run: layers, feature tables, quick-look, ranking chart,
    run.json; return the feature summary.

    ``features`` is a :class:`terrain.summary.features.FeatureSummary`, or
    :func:`terrain.summary.features.summary_steps` of ``result`` (an
    iterator: first what the figures draw, then the whole summary). Then,
    in a run held in memory, the layers, which need no summary, are written
    in a forked copy of this process while the first step is made
    (:func:`terrain.outputs.beside.in_a_copy`), and the map is drawn from it
    in another copy while this process makes the second step and writes
    the tables; ``run.json``'s ``timings`` say how long the summary took
    (``summary_s``).
    """
    out = Path(outdir)
    kind = result.job.kind
    created = _now()
    clock = _Clock()
    gpkg, csv, ranks = [f.name for f in MANIFEST[kind] if f.name.endswith((".gpkg", ".csv"))][:3]

    def layers():
        write_layers(out, result, command_line=command_line)

    steps, layers_here, drawn = None, True, features
    if not isinstance(features, FeatureSummary):  # the layers are written beside the summary
        steps, layers_here = iter(features), result.layout.on_disk
        paths = [out / f"{name}.tif" for name in result.layers]
        with contextlib.nullcontext() if layers_here else in_a_copy(clock, "layers", layers, paths):
            with clock("summary"):
                drawn = next(steps)

    def files():
        nonlocal features
        if steps is not None:  # while the map is drawn from the first step
            with clock("summary"):
                features = next(steps)
            steps.close()
        if layers_here:
            with clock("layers"):
                layers()
        with clock("tables"):
            write_frames(out / gpkg, features.frames, vector_descriptions(result, features.frames))
            write_csv(out / csv, rounded(features.table, COLUMN_KINDS,
                                         geographic=result.dem.geographic))
            write_csv(out / ranks, rounded(features.ranks, RANK_COLUMN_KINDS))
            if features.links is not None:  # relations: parents.csv / spills.csv
                write_csv(out / LINK_CSV[kind], rounded(features.links, LINK_COLUMN_KINDS))

    write_beside(out, clock, files,  # figures drawn while the files are written
                 {"quicklook.png": lambda: plot.feature_map(result, drawn),
                  "ranking.png": lambda: plot.ranking_chart(result, drawn)})
    run = provenance(result, input_path=input_path, command_line=command_line, created=created,
                     parameters={**result.job.describe(), "features": features.settings})
    run.update({"features": int(len(features.table)),
                "pair_log_entries": int(result.log["birth"].size),
                "pair_log_bytes_per_entry": int(sum(np.dtype(result.log[k].dtype).itemsize
                                                    for k in LOG_FIELDS)),
                "timings": clock.timings(result.info.get("wall_seconds", 0.0))})
    write_record(out, run)
    return features


@published(lambda result: "catchments")
def write_catchment_run(outdir: str | Path, result, summary, *, input_path: str | None,
                        outlets_path: str | None, command_line: str | None = None) -> None:
    """Write a catchment run: probability layers, polygons, outlets, map, run.json.

    ``summary`` is :func:`terrain.summary.catchments.summarise_catchments`'s
    result: its tables go into ``catchments.gpkg`` (one layer each) and one
    CSV each (none without outlets).
    """
    out = Path(outdir)
    created = _now()
    clock = _Clock()

    def files():
        with clock("layers"):
            write_layers(out, result, command_line=command_line)
        if summary.frames:
            with clock("tables"):
                write_frames(out / "catchments.gpkg", summary.frames,
                             vector_descriptions(result, summary.frames, note=DRAINAGE_NOTE))
                for name, frame in summary.frames.items():
                    write_csv(out / f"{name}.csv", rounded(frame, FRAME_COLUMN_KINDS[name],
                                                           geographic=result.dem.geographic))

    write_beside(out, clock, files,  # the map drawn while the files are written
                 {"quicklook.png": lambda: plot.catchment_map(result, summary)})
    job = result.job
    run = provenance(result, input_path=input_path, command_line=command_line, created=created,
                     parameters={**job.describe(), "outlets_file": outlets_path})
    renamed = {i: lid for i, lid in zip(job.ids, job.layer_ids) if i != lid}
    if renamed:
        run["layer_ids"] = renamed
    run["timings"] = clock.timings(result.info.get("wall_seconds", 0.0))
    write_record(out, run)


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
    geographic = any_run.dem.geographic
    clock = _Clock()
    with clock("tables"):
        write_csv(out / "sweep.csv", rounded(result.rows, result.row_kinds, geographic=geographic))
        write_csv(out / "kernel_sensitivity.csv",
                  rounded(result.sensitivity, result.sensitivity_kinds, geographic=geographic))
    with clock("figures"), plain_text():
        write_figure(out / "sweep.png",
                     sweepchart.sweep_figure(result, units=any_run.dem.unit_label))
    run = provenance(any_run, input_path=input_path, command_line=command_line, created=created,
                     parameters={**result.job.describe(), "features": int(result.ids.size),
                                 "top_features": result.top})
    run["parameters"].pop("error_model")
    run["defaults"] = result.defaults
    if result.note is not None:
        run["kernel_sensitivity_note"] = str(result.note)
    run["runs"] = [{"error_model": r.model.as_dict(), "realisations_done": r.n,
                    "execution": r.info} for r in result.runs.values()]
    run.pop("execution")
    run.pop("realisations_done")
    run["timings"] = clock.timings(sum(r.info.get("wall_seconds", 0.0)
                                       for r in result.runs.values()))
    write_record(out, run)
