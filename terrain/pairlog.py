"""The pair log: what one realisation of a peaks or depressions run records.

Every realisation's pairs become rows of equal-length arrays
(:data:`LOG_FIELDS`: realisation, birth and death cells, their values,
the edge-limited flag and the unperturbed DEM's region of the birth cell);
depressions add a pond log (:data:`POND_FIELDS`: each wet region's ponded
area and volume, summed in the fixed point of :data:`AREA_QUANTUM` and
:data:`VOLUME_QUANTUM`). Jobs make these logs; the runner folds them in
realisation order; summaries, sweeps and writers read them through the
helpers here (weights, the largest figure per realisation and region), so
none of them imports a job.
"""

from __future__ import annotations

import numpy as np

__all__ = ["LOG_FIELDS", "POND_FIELDS", "WEIGHTS", "RELATION_FIELDS", "AREA_QUANTUM", "VOLUME_QUANTUM",
           "pair_log", "pond_log", "concat_logs", "proportion", "log_weights", "region_figures"]

#: Fields each logged pair carries besides its own: its elder's region (parent /
#: spills into) and, for summits, the isolation and its edge flag; made by
#: :func:`terrain.jobs.relations.pair_log`.
RELATION_FIELDS = ("elder_region", "isolation", "isolation_edge")
LOG_FIELDS = ("real", "birth", "death", "birth_value", "death_value", "edge_limited", "region"
              ) + RELATION_FIELDS
POND_FIELDS = ("pond_real", "pond_region", "pond_area", "pond_volume")
WEIGHTS = ("persistence", "count")

#: Ponded areas and volumes are summed in fixed point: each cell adds its area
#: and volume rounded to these quanta (2**-16 m^2, 2**-12 m^3) as int64, so a
#: region's sum is exact and the same in any order -- whole raster or block by
#: block (float sums would differ in the last bits). Largest sums: 1.4e14 m^2
#: and 2.2e15 m^3.
AREA_QUANTUM = 2.0 ** -16
VOLUME_QUANTUM = 2.0 ** -12


def pair_log(p, death_value: np.ndarray, thr: float, i: int, n_cells: int, region) -> dict:
    """The pair log of realisation ``i`` without its relation fields: the pairs of
    ``p`` at least ``thr`` persistent, with ``death_value`` for their death values
    and ``region(birth cells)`` for the unperturbed DEM's region of each birth
    (:func:`terrain.jobs.relations.pair_log` adds :data:`RELATION_FIELDS`)."""
    keep = p.persistence >= thr
    cell_t = np.int32 if n_cells < 2**31 - 1 else np.int64
    birth = p.birth[keep]
    return {
        "real": np.full(int(keep.sum()), i, np.int32),
        "birth": birth.astype(cell_t),
        "death": p.death[keep].astype(cell_t),
        "birth_value": p.birth_value[keep].astype(np.float32),
        "death_value": death_value[keep].astype(np.float32),
        "edge_limited": p.edge_limited[keep],
        "region": region(birth),
    }


def pond_log(i: int, area: np.ndarray, vol: np.ndarray) -> dict:
    """The pond log of realisation ``i`` from its per-region fixed-point sums
    (``count_ponding`` of :mod:`terrain.engine.persistence`): regions holding water."""
    wet = np.flatnonzero(area > 0)
    return {"pond_real": np.full(wet.size, i, np.int32), "pond_region": wet.astype(np.int32),
            "pond_area": area[wet] * AREA_QUANTUM, "pond_volume": vol[wet] * VOLUME_QUANTUM}


def concat_logs(logs: list[dict], fields) -> dict:
    """Concatenate per-chunk logs field by field (empty arrays when none)."""
    if not logs:
        return {k: np.empty(0) for k in fields}
    return {k: np.concatenate([g[k] for g in logs]) for k in fields}


def proportion(count: np.ndarray, n: int) -> tuple[np.ndarray, np.ndarray]:
    """Share and its Monte Carlo standard error sqrt(p(1-p)/N)."""
    p = count / max(n, 1)
    return p, np.sqrt(p * (1 - p) / max(n, 1))


def log_weights(log: dict, weight: str = "persistence") -> np.ndarray:
    """Weight of each logged pair: its figure (prominence or depth; for the
    highest summit its height above the level logged as its death value) or 1."""
    if weight == "count":
        return np.ones(log["birth"].size)
    return np.abs(log["birth_value"].astype(np.float64) - log["death_value"].astype(np.float64))


def region_figures(log: dict, *, with_birth: bool = False) -> tuple:
    """Per (realisation, region) with a counted pair: the largest figure born in it.

    Returns ``(real, region, figure, edge_limited)`` sorted by realisation,
    then region; ``edge_limited`` is the flag of the largest pair, and with
    ``with_birth`` its birth cell comes fifth. Pairs born outside every
    region are left out.
    """
    inside = log["region"] > 0
    real = log["real"][inside].astype(np.int64)
    reg = log["region"][inside].astype(np.int64)
    fig = log_weights({k: log[k][inside] for k in ("birth", "birth_value", "death_value")})
    edge = log["edge_limited"][inside]
    order = np.lexsort((fig, reg, real))
    real, reg, fig, edge = real[order], reg[order], fig[order], edge[order]
    last = np.ones(order.size, bool)
    last[:-1] = (real[1:] != real[:-1]) | (reg[1:] != reg[:-1])
    out = real[last], reg[last], fig[last], edge[last]
    if with_birth:
        out += (log["birth"][inside][order][last].astype(np.int64),)
    return out
