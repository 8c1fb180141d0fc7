"""One design for every quick-look map: the map frame.

A :class:`MapFrame` draws a map of one DEM the same way for every command:

- a hillshade base (nodata filled from the nearest valid cell before shading,
  so its edges make no false cliffs), with nodata cells masked and shown as
  such, hatched, with a legend entry;
- the command's main layer on top, with a colour bar whose label says what
  the layer is and its units in words;
- aspect correct for geographic CRSs (a degree of longitude drawn
  ``cos(latitude)`` times as long as a degree of latitude), a scale bar of a
  round length, and a north arrow only when the grid is north-up in a known
  CRS, both where the map is emptiest (:mod:`terrain.outputs.furniture`);
- polygons, points and contour lines, each with a legend entry (the legend
  names every symbol and colour drawn);
- labels placed so that they overlap neither each other nor any marker
  (:mod:`terrain.outputs.labels`), with leader lines where a label had to
  move; at most :data:`MAX_LABELS`, and one that the placement could not
  clear is left out (its marker stays) and named in the footer;
- a title, and a footer with the error model, the realisation count and the
  caution; fonts of at least 9 pt at the saved size, laid out tightly.

Memory: rasters with more than :data:`MAX_PIXELS` cells a side are pooled in
blocks before drawing (elevations by mean, layers by maximum so single cells
stay visible), so a finished map holds a few float64 arrays of at most
``MAX_PIXELS`` squared cells whatever the DEM's size; while a layer is
pooled, one float64 copy of it on the DEM's grid exists for a moment (8
bytes per cell; the hillshade of a DEM with nodata adds 16 for the nearest-
cell indices).

Text sizes, ink and the palettes are the house style
(:mod:`terrain.outputs.style`).
"""

from __future__ import annotations

import math
import textwrap
import warnings
from typing import TYPE_CHECKING

import numpy as np

from ..dem import Dem
from ..io import release_freed_memory
from ..layers import MAX_PIXELS, PRESHADE_CELLS
from .furniture import furniture_boxes, north_arrow, north_up, place_furniture, scale_bar
from .labels import place_labels
from .style import DPI, FONT_PT, INK, NODATA, halo, power_of_ten

if TYPE_CHECKING:
    from matplotlib.figure import Figure

    from ..layout import RunLayout

__all__ = ["MapFrame", "hillshade", "prepare_drawing", "pooling", "pool_bands", "pooled_dem",
           "MAX_LABELS", "NAMED_UNPLACED"]

WIDTH_IN = 10.0  # every map is this wide
MAP_HEIGHT_IN = 8.5  # and its map at most this tall
MAX_STRETCH = 3.0  # a map at most this many times wider than tall (or taller than wide); a
#                     thinner strip of raster is drawn stretched, and the subtitle says so

#: a map places at most this many labels, the most important first (a quick-look with a
#: hundred outlets stays readable, and adjustText's cost grows with the square of them);
#: the footer counts the rest
MAX_LABELS = 30
#: the footer names at most this many labels left out, then says how many more
NAMED_UNPLACED = 8
def _pool(a: np.ndarray, k: int, how) -> np.ndarray:
    if k == 1:
        return a
    r, c = a.shape
    pad = np.full((-(-r // k) * k, -(-c // k) * k), np.nan)
    pad[:r, :c] = a
    blocks = pad.reshape(pad.shape[0] // k, k, pad.shape[1] // k, k)
    fill = _FILLS.get(how)
    if fill is None:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", RuntimeWarning)  # all-nodata blocks
            return how(blocks, axis=(1, 3))
    # numpy's nan-reductions warn on an all-nodata block; a warnings filter is global to
    # the process and the layers are written in another thread meanwhile (each file's
    # write restores the filters it found), so the common reductions are done without
    # a warning: NaN where a block has no valid cell
    valid = ~np.isnan(blocks)
    count = valid.sum(axis=(1, 3))
    filled = np.where(valid, blocks, fill)
    if how is np.nanmean:
        with np.errstate(invalid="ignore", divide="ignore"):  # thread-local in numpy
            out = filled.sum(axis=(1, 3)) / count
    else:
        out = (filled.max if how is np.nanmax else filled.min)(axis=(1, 3))
    out[count == 0] = np.nan
    return out


_FILLS = {np.nanmean: 0.0, np.nanmax: -np.inf, np.nanmin: np.inf}


def pool_bands(read, shape: tuple[int, int], k: int, how) -> np.ndarray:
    """A raster too large to hold, pooled in ``k`` x ``k`` blocks as :class:`MapFrame`
    pools: ``read(r0, r1)`` returns rows ``r0:r1`` (float64, NaN for nodata),
    read in bands of whole blocks, so only one band is held at a time."""
    rows, cols = shape
    step = k * max(1, (1 << 20) // max(k * cols, 1))  # bands of about a million cells
    pooled = []
    for r0 in range(0, rows, step):
        pooled.append(_pool(np.asarray(read(r0, min(r0 + step, rows)), np.float64), k, how))
        release_freed_memory()  # the band's arrays, before the next is read
    return np.concatenate(pooled)


def pooled_dem(dem: Dem, k: int) -> Dem:
    """``dem`` pooled in ``k`` x ``k`` blocks (mean of the valid cells; nodata where a
    block has none) on a grid ``k`` times coarser, read band by band: the base
    of a quick-look of a DEM kept on disk."""
    a, b, c, d, e, f = dem.transform
    z = pool_bands(lambda r0, r1: dem.window(r0, r1, 0, dem.shape[1]), dem.shape, k, np.nanmean)
    return Dem(z=z, nodata=np.isnan(z), transform=(a * k, b * k, c, d * k, e * k, f), crs=dem.crs,
               geographic=dem.geographic, linear_unit_m=dem.linear_unit_m,
               vertical_units=dem.vertical_units, vertical_unit=dem.vertical_unit,
               vertical_unit_source=dem.vertical_unit_source, source=dem.source)


def pooling(shape: tuple[int, int]) -> int:
    """The block side a map pools a raster of ``shape`` by."""
    return max(1, math.ceil(max(shape) / MAX_PIXELS))


#: The last hillshade made and what it was made from, as one (key, shade) pair under
#: "last" (one assignment: a map may read it while prepare_drawing's thread sets it):
#: the maps of one run (and the peaks and depressions maps of one DEM) share it.
#: 8 bytes per drawn cell.
_LAST_SHADE: dict = {}


def hillshade(dem: Dem, *, azimuth: float = 315.0, altitude: float = 45.0,
              k: int = 1) -> np.ndarray:
    """Hillshade in [0, 1] (matplotlib's LightSource, cell sizes and elevations in
    metres: a DEM in feet is not exaggerated 3.28 times).

    Nodata cells take the elevation of the nearest valid cell before shading,
    so the edges of nodata areas make no false cliffs; mask them when drawing.
    ``k`` pools the DEM in k x k blocks first (mean). The last hillshade is
    kept (read-only) and given again for the same elevations, mask, grid and
    light.

    References
    ----------
    .. [1] Horn, B. K. P. (1981). Hill shading and the reflectance map.
       Proceedings of the IEEE 69(1) (the shading model; matplotlib's
       ``LightSource.hillshade`` implements a Lambertian variant).
    """
    import hashlib

    digest = hashlib.blake2b(np.ascontiguousarray(dem.z).view(np.uint8), digest_size=16)
    digest.update(np.packbits(dem.nodata).tobytes())
    key = (digest.hexdigest(), str(dem.z.dtype), dem.shape, tuple(dem.transform), dem.geographic,
           dem.linear_unit_m, azimuth, altitude, k)
    last = _LAST_SHADE.get("last")
    if last is not None and last[0] == key:
        return last[1]
    shade = _shade(dem, azimuth, altitude, k)
    shade.setflags(write=False)
    _LAST_SHADE["last"] = (key, shade)
    return shade


def _shade(dem: Dem, azimuth: float, altitude: float, k: int) -> np.ndarray:
    from matplotlib.colors import LightSource
    from scipy import ndimage

    z = dem.z.astype(np.float64)
    if dem.nodata.any():
        idx = ndimage.distance_transform_edt(dem.nodata, return_distances=False,
                                             return_indices=True)
        z = z[tuple(idx)]
    z = _pool(z, k, np.nanmean)
    if min(z.shape) < 2:  # no gradient on a single row or column: flat grey
        return np.full(z.shape, 0.5)
    w, h = dem.cell_metres()
    ls = LightSource(azdeg=azimuth, altdeg=altitude)
    return ls.hillshade(z, vert_exag=dem.metres_per_unit, dx=float(np.mean(w)) * k,
                        dy=float(np.mean(h)) * k)


def prepare_drawing(dem: Dem, layout: RunLayout | None = None) -> None:
    """Import what drawing a map of ``dem`` takes and shade the DEM as the map will.

    About 2 s of a process's first map is importing matplotlib (its figure,
    Agg canvas, collections, text paths), adjustText and reading the font
    list, and a little more is the hillshade (0.14 s at 1024²), which depends
    on the DEM alone. A command line calls this in a second thread while the
    realisations run in the worker processes, so that time is not spent
    after them. It draws nothing and changes no setting; the hillshade is
    kept as :func:`hillshade` keeps its last one, so the map is the same
    with or without it. The hillshade is made only when ``layout`` (the
    run's :class:`~terrain.layout.RunLayout`) keeps the DEM in memory, and
    for a DEM of at most
    :data:`terrain.layers.PRESHADE_CELLS` cells (the shading's copies of
    the elevations then overlap the realisations' memory; the memory guard
    counts them, ``resources.PRESHADE``).
    """
    import adjustText  # noqa: F401
    import matplotlib.collections  # noqa: F401
    import matplotlib.colors  # noqa: F401
    import matplotlib.lines  # noqa: F401
    import matplotlib.textpath  # noqa: F401
    import matplotlib.ticker  # noqa: F401
    from matplotlib import font_manager
    from matplotlib.backends.backend_agg import FigureCanvasAgg  # noqa: F401
    from matplotlib.figure import Figure  # noqa: F401

    font_manager.findfont(font_manager.FontProperties())
    if layout is not None and not layout.on_disk and dem.z.size <= PRESHADE_CELLS:
        hillshade(dem, k=pooling(dem.shape))


class MapFrame:
    """A quick-look map of one DEM (see the module docstring).

    Draw with :meth:`layer`, :meth:`polygons`, :meth:`points`,
    :meth:`contours` and :meth:`label`, then take the finished figure from
    :meth:`figure`.

    Parameters
    ----------
    dem : Dem
    title : str
        What the map shows (one line, bold).
    subtitle : str
        How to read it (one or two lines, or empty).
    footer : str
        The error model and realisations line; the caution is added below it.
    caution : str
        The caution every output carries.
    shade : array, optional
        The hillshade of ``dem`` on the grid drawn, made beforehand
        (:func:`hillshade` with this frame's pooling); by default it is made here.
    """

    def __init__(self, dem: Dem, *, title: str, subtitle: str, footer: str, caution: str,
                 shade: np.ndarray | None = None):
        from matplotlib.backends.backend_agg import FigureCanvasAgg
        from matplotlib.figure import Figure

        self.dem = dem
        self.k = pooling(dem.shape)
        rows, cols = dem.shape
        a, _, c, _, e, f = dem.transform
        self.extent = (c, c + a * cols, f + e * rows, f)
        k = self.k
        self.view_extent = (c, c + a * k * -(-cols // k), f + e * k * -(-rows // k), f)
        self.fig = Figure(figsize=(10, 10), dpi=DPI)
        FigureCanvasAgg(self.fig)
        self.ax = self.fig.add_axes((0.1, 0.1, 0.7, 0.7))
        self.cax = None
        self.title, self.subtitle, self.footer, self.caution = title, subtitle, footer, caution
        self.handles: list = []
        self.avoid: list[tuple[float, float, float]] = []  # (x, y, marker size in points)
        self.texts: list[tuple[float, float, str]] = []
        self.names: list[str] = []  # each label's short name, for the unplaced note
        #: the footer's note when some labels find no room ({names}: their short names)
        self.unplaced = "No room on the map to label {names}."
        self._base(shade)

    # -- drawing ---------------------------------------------------------------------
    def view(self, values: np.ndarray, *, how=np.nanmax) -> np.ndarray:
        """``values`` on the drawn grid: nodata as NaN, pooled like the base."""
        v = np.where(self.dem.nodata, np.nan, np.asarray(values, np.float64))
        return _pool(v, self.k, how)

    def _base(self, shade: np.ndarray | None) -> None:
        ax, dem = self.ax, self.dem
        nodata = _pool(dem.nodata.astype(np.float64), self.k, np.nanmin) > 0
        shade = np.ma.masked_where(nodata, hillshade(dem, k=self.k) if shade is None else shade)
        # every image is resampled as values and coloured after ("data"): matplotlib
        # 3.10 otherwise colours every cell first when the map shrinks it less than
        # 3 times (four floats per cell: half a 1024² map's saving time)
        ax.imshow(shade, cmap="gray", vmin=-0.45, vmax=1.05, extent=self.view_extent,
                  interpolation="bilinear" if self.k == 1 else "nearest", gid="hillshade",
                  interpolation_stage="data")
        if nodata.any():
            from matplotlib.patches import Patch

            ax.set_facecolor(NODATA)  # under the hillshade's smoothed edge too
            flat = np.ma.masked_where(~nodata, np.ones(nodata.shape))
            ax.imshow(flat, cmap=_single(NODATA), vmin=0, vmax=1, extent=self.view_extent,
                      interpolation="nearest", label="no data", gid="nodata",
                      interpolation_stage="data")
            if min(nodata.shape) >= 2:
                ax.contourf(nodata.astype(float), levels=[0.5, 1.5], colors="none",
                            hatches=["////"], extent=self.view_extent, origin="upper"
                            ).set_label("no data")
            self.handles.append(Patch(facecolor=NODATA, edgecolor="0.45", hatch="////",
                                      label="no data"))
        ax.set_xlim(self.extent[0], self.extent[1])
        ax.set_ylim(self.extent[2], self.extent[3])
        self._axes_style()

    def _axes_style(self) -> None:
        from matplotlib.ticker import MaxNLocator

        ax, dem = self.ax, self.dem
        if dem.geographic:
            names = ("longitude (degrees)", "latitude (degrees)")
        else:
            unit = "m" if dem.linear_unit_m == 1.0 else "CRS units"
            names = (f"easting ({unit})", f"northing ({unit})") if dem.crs else \
                ("x (no CRS: cell units)", "y (no CRS: cell units)")
        ax.set_aspect(self.aspect())
        ax.set_xlabel(names[0], fontsize=FONT_PT)
        ax.set_ylabel(names[1], fontsize=FONT_PT)
        ax.ticklabel_format(useOffset=False, style="plain")
        for axis in (ax.xaxis, ax.yaxis):
            axis.set_major_locator(MaxNLocator(nbins=5))
        ax.tick_params(labelsize=FONT_PT)

    def layer(self, values: np.ndarray, *, cmap, label: str, vmax: float | None = None,
              sqrt: bool = False, hide: np.ndarray | None = None, floor: float = 0.0,
              log: bool = False):
        """The main layer over the hillshade with its colour bar.

        Cells at 0 or below ``floor``, nodata and cells where ``hide`` is True
        are left transparent. ``sqrt`` draws a square-root colour scale,
        ``log`` a logarithmic one from ``floor`` (said in the colour bar's label).
        """
        from matplotlib.colors import LogNorm, Normalize, PowerNorm

        v = self.view(values)
        mask = ~(v > 0) | (v < floor) | np.isnan(v)
        if hide is not None:
            mask |= _pool(np.asarray(hide, np.float64), self.k, np.nanmin) > 0
        top = vmax if vmax is not None else (float(np.nanmax(v)) if np.isfinite(v).any() else 1.0)
        top = top if top > 0 else 1.0
        norm = PowerNorm(0.5, vmin=0.0, vmax=top) if sqrt else Normalize(0.0, top)
        if log:
            low = floor if floor > 0 else float(np.nanmin(np.where(v > 0, v, np.nan)))
            norm = LogNorm(vmin=low, vmax=max(top, low * 10))
        # low values more transparent: the hillshade shows through where little is going on
        alpha = np.clip(0.45 + 0.5 * np.nan_to_num(norm(v).filled(0.0)), 0.0, 0.95)
        im = self.ax.imshow(np.ma.masked_where(mask, v), cmap=cmap, norm=norm, alpha=alpha,
                            extent=self.view_extent, interpolation="nearest", gid="layer",
                            interpolation_stage="data")
        self.cax = self.fig.add_axes((0.85, 0.1, 0.03, 0.7))
        bar = self.fig.colorbar(im, cax=self.cax)
        text = label + (" (square-root scale)" if sqrt else " (log scale)" if log else "")
        bar.set_label("\n".join(textwrap.wrap(text, 44)), fontsize=FONT_PT + 1)
        bar.ax.tick_params(labelsize=FONT_PT)
        if log:  # plain-text powers of ten: figures are drawn with mathtext off
            from matplotlib.ticker import FuncFormatter, LogLocator, NullFormatter

            bar.ax.yaxis.set_major_locator(LogLocator(base=10.0))
            bar.ax.yaxis.set_major_formatter(FuncFormatter(lambda v, _: power_of_ten(v)))
            bar.ax.yaxis.set_minor_formatter(NullFormatter())
        return im

    def polygons(self, geoms, *, colour: str, label: str, lw: float = 1.5) -> None:
        """Outlines of shapely (multi)polygons, as one legend entry."""
        from matplotlib.collections import PathCollection

        paths = _outline_paths(geoms)
        if not paths:
            return
        self._haloed(PathCollection, paths, lw, halo_lw=lw + 1.6, zorder=3, facecolors="none",
                     edgecolors=colour, label=label)
        self.handles.append(_line_key(colour, label, lw=lw))

    def _haloed(self, kind, paths, lw: float, *, halo_lw: float, zorder: float, **style) -> None:
        """A collection of ``paths`` over a white halo ``halo_lw`` points wide (the look of
        :func:`~terrain.outputs.style.halo`): the halo is a collection of its own just
        beneath, since a path effect makes matplotlib draw a collection path by path
        (seconds for a map of a few hundred features)."""
        colour = "edgecolors" if "edgecolors" in style else "colors"
        # solid: a dashed halo's dashes would scale with its width and miss the line's
        under = {k: v for k, v in style.items() if k not in (colour, "label", "linestyles")}
        self.ax.add_collection(kind(paths, linewidths=halo_lw, alpha=0.85, gid="halo",
                                    zorder=zorder - 0.01, **{colour: "white"}, **under))
        self.ax.add_collection(kind(paths, linewidths=lw, zorder=zorder, **style))

    def points(self, x: np.ndarray, y: np.ndarray, *, marker: str, face: str, label: str,
               size: float = 8.0) -> None:
        """Markers at CRS coordinates (NaN skipped), as one legend entry. Markers
        are never clipped: one at the raster's edge is drawn whole, over the frame."""
        x, y = np.asarray(x, float), np.asarray(y, float)
        ok = np.isfinite(x) & np.isfinite(y)
        if not ok.any():
            return
        line, = self.ax.plot(x[ok], y[ok], ls="none", marker=marker, ms=size, mfc=face, mec=INK,
                             mew=1.0, label=label, zorder=5, clip_on=False)
        self.handles.append(line)
        self.avoid += [(a, b, size) for a, b in zip(x[ok].tolist(), y[ok].tolist())]

    def lines(self, segments, *, colour: str, label: str, lw: float = 0.8,
              ls: str = "solid") -> None:
        """Straight lines between pairs of CRS points (``((x0, y0), (x1, y1))``, NaN
        skipped), e.g. tying a key col to its summit, as one legend entry."""
        from matplotlib.collections import LineCollection

        segs = [s for s in (np.asarray(s, float) for s in segments) if np.isfinite(s).all()]
        if not segs:
            return
        self._haloed(LineCollection, segs, lw, halo_lw=lw + 1.4, zorder=4, colors=colour,
                     linestyles=ls, label=label)
        self.handles.append(_line_key(colour, label, lw=lw, ls=ls))

    def contours(self, values: np.ndarray, levels, *, colour: str, label: str,
                 styles=("solid",), widths=(1.4,), keyed: bool = True) -> bool:
        """Contour lines of a layer (e.g. a probability at 50% and 90%) in one
        colour, one style per level, as one legend entry unless not ``keyed``
        (say what the styles mean with :meth:`key`); returns whether any line
        was drawn."""
        import contourpy
        from matplotlib.collections import PathCollection
        from matplotlib.path import Path

        v = self.view(values)
        if min(v.shape) < 2 or not np.isfinite(v).any() or np.nanmax(v) < min(levels):
            return False
        # matplotlib's own contouring (its default algorithm and corner masking) on
        # the cells' indices, placed by the drawn grid's affine afterwards, one path
        # per level as matplotlib's contour set draws them: the same lines without
        # its set's own passes over the grid (~0.04 s at 1024²); the generator and
        # its float64 index grids (16 bytes per drawn cell) go when this returns
        gen = contourpy.contour_generator(z=np.ma.masked_invalid(v), name="mpl2014",
                                          corner_mask=True,
                                          line_type=contourpy.LineType.SeparateCode)
        left, right, bottom, top = self.view_extent
        rows, cols = v.shape
        dx, dy = (right - left) / cols, (top - bottom) / rows
        paths = []
        for level in levels:
            lines, codes = gen.lines(level)
            ij = np.concatenate(lines) if lines else np.empty((0, 2))
            xy = np.column_stack([left + (ij[:, 0] + 0.5) * dx, bottom + (rows - 0.5 - ij[:, 1]) * dy])
            paths.append(Path(xy, np.concatenate(codes) if lines else None))
        if not any(len(p.vertices) for p in paths):
            return False
        n = len(levels)
        self.ax.add_collection(PathCollection(
            paths, facecolors="none", edgecolors=colour, linestyles=list(styles)[:n],
            linewidths=list(widths)[:n], zorder=4, label=label,
            path_effects=halo(max(widths) + 1.6)), autolim=False)
        if keyed:
            self.handles.append(_line_key(colour, label, lw=widths[0], ls=styles[0]))
        return True

    def symbol(self, glyph: str, label: str) -> None:
        """A legend entry for a sign used in the labels (e.g. ``*``), drawn as the sign."""
        from matplotlib.lines import Line2D
        from matplotlib.path import Path
        from matplotlib.textpath import TextPath

        # the glyph's outline as a marker path, centred: a mathtext marker ("$*$") would be
        # drawn as its raw text, since figures are saved with mathtext off
        path = TextPath((0, 0), glyph, size=1)
        verts = path.vertices - (path.vertices.min(axis=0) + path.vertices.max(axis=0)) / 2
        self.handles.append(Line2D([], [], ls="none", marker=Path(verts, path.codes), ms=9,
                                   color=INK, label=label, gid=f"glyph {glyph}"))

    def key(self, label: str, *, colour: str = "0.35", ls: str = "solid", lw: float = 1.4) -> None:
        """A legend entry for a line style used by several artists (e.g. 90% dashed)."""
        self.handles.append(_line_key(colour, label, lw=lw, ls=ls))

    def label(self, x: float, y: float, text: str, *, name: str | None = None) -> None:
        """A label for the point (x, y), the most important first; placed when the
        figure is finished. ``name`` (default: the text) is how the footer names it
        if it finds no room."""
        if np.isfinite(x) and np.isfinite(y):
            self.texts.append((float(x), float(y), text))
            self.names.append(name or text)

    # -- finishing -------------------------------------------------------------------------
    def figure(self) -> Figure:
        """Lay the map out, place the labels and return the Figure.

        The scale bar and the north arrow go where the map holds the fewest
        markers and labelled points (:func:`~terrain.outputs.furniture.place_furniture`:
        a corner, or the middle of an edge), so they cover as little of the map's
        content as it allows."""
        arrow = north_up(self.dem)
        scale_bar(self.ax, self.dem, self.extent)
        if arrow:
            north_arrow(self.ax, "upper right")
        self._legend_and_text()
        self.ax.set_aspect(self.aspect())  # imshow resets it
        self.shown = self._shown_ratio()
        if self.shown is not None:
            self.ax.set_aspect("auto")
            self.subtitle_text.set_text(self.subtitle_text.get_text() + "\nDrawn stretched: the "
                                        "raster is a thin strip.")
        _lay_out(self)
        place_furniture(self.ax, self.avoid + [(x, y, 0.0) for x, y, _ in self.texts], arrow=arrow)
        kept = {t.get_text() for t in place_labels(self.ax, self.texts[:MAX_LABELS], self.avoid,
                                                   fixed=furniture_boxes(self.ax))}
        missing = [n for (*_, text), n in zip(self.texts, self.names) if text not in kept]
        if missing:  # say so in the footer; the map keeps its size, so labels stay clear
            self.footer += " " + self.unplaced.format(names=_some(missing))
            self.footer_text.set_text(self._footer())
            _lay_out(self)
        return self.fig

    def _shown_ratio(self) -> float | None:
        """The height/width ratio to draw a thin strip at (None: true to scale)."""
        x0, x1, y0, y1 = self.extent
        ratio = abs((y1 - y0) / (x1 - x0)) * self.aspect()
        if 1 / MAX_STRETCH <= ratio <= MAX_STRETCH:
            return None
        return min(max(ratio, 1 / MAX_STRETCH), MAX_STRETCH)

    def aspect(self) -> float:
        """Data aspect of the map: 1 in a projected CRS; 1 / cos(latitude of the
        raster's centre) in a geographic one, so a degree of longitude is drawn
        as long as it is on the ground there."""
        if not self.dem.geographic:
            return 1.0
        return 1.0 / math.cos(math.radians(float(np.mean(self.dem.row_latitudes()))))

    def _legend_and_text(self) -> None:
        fig = self.fig
        self.title_text = fig.text(0.5, 0.98, self.title, ha="center", va="top",
                                   fontsize=FONT_PT + 3, weight="bold")
        self.subtitle_text = fig.text(0.5, 0.98, "\n".join(textwrap.wrap(self.subtitle, 120)),
                                      ha="center", va="top", fontsize=FONT_PT + 1)
        self.legend = None
        if self.handles:
            self.legend = fig.legend(handles=self.handles, loc="upper center",
                                     ncols=min(2, len(self.handles)),
                                     fontsize=FONT_PT, frameon=False, handlelength=2.4,
                                     columnspacing=1.6)
        self.footer_text = fig.text(0.5, 0.01, self._footer(), ha="center", va="bottom",
                                    fontsize=FONT_PT, color="0.25")

    def _footer(self) -> str:
        return "\n".join(textwrap.wrap(self.footer, 140) + textwrap.wrap(self.caution, 140))


def _outline_paths(geoms) -> list:
    """One compound matplotlib Path per polygon of ``geoms`` (shapely polygons and
    multipolygons; None skipped): its exterior, then its holes, each ring
    closed -- the vertices and codes of ``Path(ring, closed=True)`` joined by
    ``Path.make_compound_path`` -- with the rings' coordinates and codes made in
    bulk, not ring by ring (a map may outline thousands of features)."""
    import shapely
    from matplotlib.path import Path

    parts = shapely.get_parts(np.array([g for g in geoms if g is not None], dtype=object))
    parts = parts[~shapely.is_empty(parts)]
    if not parts.size:
        return []
    rings, owner = shapely.get_rings(parts, return_index=True)  # exterior first, in order
    xy, ring = shapely.get_coordinates(rings, return_index=True)
    codes = np.full(len(xy), Path.LINETO, Path.code_type)
    first = np.flatnonzero(np.r_[True, ring[1:] != ring[:-1]])
    codes[first] = Path.MOVETO
    codes[np.r_[first[1:], len(xy)] - 1] = Path.CLOSEPOLY
    cuts = np.searchsorted(owner[ring], np.arange(1, parts.size))
    return [Path(v, c) for v, c in zip(np.split(xy, cuts), np.split(codes, cuts))]


def _single(colour: str):
    from matplotlib.colors import ListedColormap

    return ListedColormap([colour])


def _line_key(colour: str, label: str, *, lw: float = 1.5, ls: str = "solid"):
    from matplotlib.lines import Line2D

    return Line2D([], [], color=colour, lw=lw, ls=ls, label=label)


def _lay_out(frame: MapFrame) -> None:
    """Size the figure to the map and place every part, measured in inches.

    The figure is :data:`WIDTH_IN` wide; the map takes the width its tick
    labels and colour bar leave (at most :data:`MAP_HEIGHT_IN` tall), with
    the title above and the legend and footer below.
    """
    fig, ax, cax = frame.fig, frame.ax, frame.cax
    r = fig.canvas.get_renderer()
    dpi, width, pad, gap = fig.dpi, WIDTH_IN, 0.15, 0.14

    def height_of(artist) -> float:
        return artist.get_window_extent(r).height / dpi if artist is not None else 0.0

    if frame.legend is not None and frame.legend.get_window_extent(r).width / dpi > width - 2 * pad:
        frame.legend.set_ncols(1)
    tight, box = ax.get_tightbbox(r), ax.get_window_extent(r)
    left, below = (box.x0 - tight.x0) / dpi, (box.y0 - tight.y0) / dpi
    above = max(tight.y1 - box.y1, 0) / dpi
    bar_room = 0.0
    if cax is not None:
        bar_room = 0.25 + 0.2 + (cax.get_tightbbox(r).x1 - cax.get_window_extent(r).x1) / dpi
    x0, x1, y0, y1 = frame.extent
    ratio = getattr(frame, "shown", None) or abs((y1 - y0) / (x1 - x0)) * ax.get_aspect()
    room = width - 2 * pad - left - max((tight.x1 - box.x1) / dpi, 0) - bar_room
    map_w = min(room, MAP_HEIGHT_IN / ratio)
    map_h = map_w * ratio
    foot_h, leg_h = height_of(frame.footer_text), height_of(frame.legend)
    title_h = height_of(frame.title_text)
    sub_h = height_of(frame.subtitle_text) if frame.subtitle else 0.0
    y_map = pad + foot_h + gap + (leg_h + gap if leg_h else 0.0) + below
    height = y_map + map_h + above + gap + sub_h + 0.05 + title_h + pad
    fig.set_size_inches(width, height)
    x_map = pad + left + (room - map_w) / 2
    ax.set_position((x_map / width, y_map / height, map_w / width, map_h / height))
    if cax is not None:
        cax.set_position(((x_map + map_w + 0.25) / width, y_map / height, 0.2 / width,
                          map_h / height))
    frame.footer_text.set_position((0.5, pad / height))
    if frame.legend is not None:
        frame.legend.set_bbox_to_anchor((0.5, (pad + foot_h + gap + leg_h) / height),
                                        transform=fig.transFigure)
    frame.title_text.set_position((0.5, 1 - pad / height))
    frame.subtitle_text.set_position((0.5, 1 - (pad + title_h + 0.05) / height))


def _some(names: list[str]) -> str:
    """``names`` joined by commas, the first :data:`NAMED_UNPLACED` of them and a count of
    the rest."""
    if len(names) <= NAMED_UNPLACED:
        return ", ".join(names)
    return ", ".join(names[:NAMED_UNPLACED]) + f" and {len(names) - NAMED_UNPLACED} more"
