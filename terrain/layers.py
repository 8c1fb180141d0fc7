"""The layer registry: every raster a run produces, described once.

The jobs accumulate layers under these names; the writer takes band
descriptions, units and notes from here; the features read their credit and
probability layers by role; the command-line help lists them. A layer name
may hold ``{id}`` (one layer per outlet).
"""

from __future__ import annotations

from dataclasses import dataclass

__all__ = ["LayerSpec", "LAYERS", "spec", "layer_name", "layers_of", "units", "read_window",
           "layer_windows", "WINDOW_CELLS", "BAND_TEXT"]

DRAINAGE_NOTE = ("describes the DEM's drainage under its stated error, not flood behaviour or "
                 "where water runs in a storm")


@dataclass(frozen=True)
class LayerSpec:
    """One output layer.

    Attributes
    ----------
    name : str
        File stem; ``{id}`` stands for an outlet id.
    job : {"peaks", "depressions", "catchments"}
    role : str
        What the layer is to the code that reads it: ``birth_credit``,
        ``death_credit``, ``birth_probability``, ``ponding_probability``,
        ``membership``, ``divide``.
    unit : {"figure", "probability", "area"}
        ``figure`` layers are in the DEM's vertical unit (or counts when
        pairs are weighted 1); probabilities are shares of realisations;
        ``area`` layers are square metres.
    description : str
        One sentence a user reads (band description, help text).
    note : str
        A caution that travels with the layer (empty when none).
    needs_outlets : bool
        Written only by a catchment run with outlets.
    bands : tuple of str
        What each band of the file holds, in order: ``estimate`` and
        ``standard_error`` (the mean over realisations and its Monte Carlo
        standard error), or ``median``, ``p05`` and ``p95`` (quantiles over
        realisations: the spread the DEM error causes). :data:`BAND_TEXT`
        words each for band descriptions.
    """

    name: str
    job: str
    role: str
    unit: str
    description: str
    note: str = ""
    needs_outlets: bool = False
    bands: tuple = ("estimate", "standard_error")

    def file_name(self, oid: str | None = None) -> str:
        return self.concrete(oid) + ".tif"

    def concrete(self, oid: str | None = None) -> str:
        return self.name.replace("{id}", str(oid)) if "{id}" in self.name else self.name


#: How a band description words each band role (``{name}`` and ``{units}`` filled in).
BAND_TEXT = {"estimate": "{name} ({units})",
             "standard_error": "{name} standard error ({units})",
             "median": "{name}: median over realisations ({units})",
             "p05": "{name}: 5% of realisations at or below ({units})",
             "p95": "{name}: 95% of realisations at or below ({units})"}

LAYERS: dict[str, LayerSpec] = {s.name: s for s in (
    LayerSpec("summit_credit", "peaks", "birth_credit", "figure",
              "expected prominence credited to the cell as the summit of a counted peak"),
    LayerSpec("col_credit", "peaks", "death_credit", "figure",
              "expected prominence credited to the cell as the key col of a counted peak"),
    LayerSpec("summit_probability", "peaks", "birth_probability", "probability",
              "share of realisations in which the cell is the summit of a counted peak"),
    LayerSpec("pit_credit", "depressions", "birth_credit", "figure",
              "expected depth credited to the cell as the pit of a counted depression"),
    LayerSpec("spill_credit", "depressions", "death_credit", "figure",
              "expected depth credited to the cell as the spill point of a counted depression"),
    LayerSpec("pit_probability", "depressions", "birth_probability", "probability",
              "share of realisations in which the cell is the pit of a counted depression"),
    LayerSpec("ponding_probability", "depressions", "ponding_probability", "probability",
              "share of realisations in which the cell holds water at least the minimum depth "
              "deep after depression filling", DRAINAGE_NOTE),
    LayerSpec("catchment_probability_{id}", "catchments", "membership", "probability",
              "share of realisations in which the cell drains to outlet {id} (its whole upstream "
              "area, nested outlets included)", DRAINAGE_NOTE, True),
    LayerSpec("subcatchment_probability_{id}", "catchments", "subcatchment", "probability",
              "share of realisations in which outlet {id} is the first chosen outlet downstream "
              "of the cell", DRAINAGE_NOTE, True),
    LayerSpec("divide_probability", "catchments", "divide", "probability",
              "share of realisations in which the cell and a neighbour lie in different "
              "sub-catchments (each chosen outlet's, or elsewhere)", DRAINAGE_NOTE, True),
    LayerSpec("channel_probability", "catchments", "channel", "probability",
              "share of realisations in which the area draining through the cell reaches the "
              "channel area", DRAINAGE_NOTE),
    LayerSpec("drainage_area", "catchments", "drainage_area", "area",
              "area draining through the cell (its own included) over realisations: median, "
              "5% and 95%", DRAINAGE_NOTE, bands=("median", "p05", "p95")),
)}


def spec(name: str) -> LayerSpec:
    """The spec of a concrete layer name (``catchment_probability_ford`` included)."""
    if name in LAYERS:
        return LAYERS[name]
    for s in LAYERS.values():
        if "{id}" in s.name and name.startswith(s.name.split("{id}")[0]):
            return s
    raise KeyError(name)


def layers_of(job: str) -> tuple[LayerSpec, ...]:
    """The layers a job writes, in registry order."""
    return tuple(s for s in LAYERS.values() if s.job == job)


def layer_name(job: str, role: str) -> str:
    """The name of ``job``'s layer with ``role`` (e.g. peaks, birth_credit -> summit_credit)."""
    for s in LAYERS.values():
        if s.job == job and s.role == role:
            return s.name
    raise KeyError((job, role))


def units(name: str, vertical_units: str | None, weight: str = "persistence") -> str:
    """Units of a layer: probabilities are shares; areas m²; figures are in the DEM's
    vertical unit (``vertical_units``, its label) or counts."""
    if spec(name).unit == "probability":
        return "probability"
    if spec(name).unit == "area":
        return "m²"
    if weight == "count":
        return "count"
    return vertical_units or "DEM units"


def read_window(layers, r0: int, r1: int, c0: int, c1: int, names=None) -> dict:
    """Every layer's (estimate, standard error) on rows ``r0:r1`` and columns
    ``c0:c1``, or only those named in ``names``.

    ``layers`` is a run's layers: a dict of whole arrays, or a set computed
    window by window when read (its ``read(r0, r1, c0, c1, names)`` method;
    out-of-core runs), which then computes only the layers asked for.
    """
    if hasattr(layers, "read"):
        return layers.read(r0, r1, c0, c1, names)
    return {k: tuple(a[r0:r1, c0:c1] for a in bands) for k, bands in layers.items()
            if names is None or k in names}


#: cells per window when layers are read, summarised and written window by window
WINDOW_CELLS = 1 << 20

#: cells a side a map draws at most (larger rasters are pooled), and so the most
#: cells a quick-look holds: figures the drawing code and the memory guard share
MAX_PIXELS = 1600
QUICKLOOK_CELLS = MAX_PIXELS ** 2
#: the largest DEM in memory (cells) whose map's hillshade a command line makes while
#: the realisations run (terrain.outputs.mapframe.prepare_drawing; one the map draws
#: unpooled; the memory guard counts it in the running phase)
PRESHADE_CELLS = QUICKLOOK_CELLS


def layer_windows(shape: tuple[int, int], cells: int = WINDOW_CELLS) -> list[tuple[int, int, int, int]]:
    """Windows ``(r0, r1, c0, c1)`` covering a grid, row-major, about ``cells``
    cells each (squares of whole 256-cell tiles, or full rows when the grid is
    narrow), for reading and writing layers window by window."""
    rows, cols = (int(x) for x in shape)
    side = max(256, int(cells ** 0.5) // 256 * 256)
    if cols <= 2 * side:
        side_c, side_r = cols, max(256, cells // max(cols, 1) // 256 * 256)
    else:
        side_c = side_r = side
    return [(r0, min(r0 + side_r, rows), c0, min(c0 + side_c, cols))
            for r0 in range(0, rows, side_r) for c0 in range(0, cols, side_c)]
