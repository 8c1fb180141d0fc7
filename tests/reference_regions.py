"""The persistence-simplified watershed cell by cell: the reference the engines' regions are checked against.

Written for the tests from the definitions, independently of the engines
(which contract steepest-descent basins, hash basin pairs and, blocked,
cut the raster into blocks): cells enter one at a time in the total order
(key, flat index); each joins its lowest earlier neighbour (so it belongs
to that cell's basin of steepest descent, [3]) and then meets the
components of its other earlier neighbours in the total order; at each
meeting the younger component dies (the elder rule, [1]); when its
persistence is below the merge level, or zero, its region joins the region
across the pass -- the entering cell's own when the neighbour's side dies,
the neighbour's when the cell's side dies -- as watershed regions are
merged by the dynamics of their minima [2]. With an outlet, a cell on the
raster edge or next to nodata finally joins the outlet (-inf).

References
----------
.. [1] Edelsbrunner, H., Letscher, D., Zomorodian, A. (2002). Topological
   persistence and simplification. Discrete Comput. Geom. 28, 511-533.
.. [2] Najman, L., Schmitt, M. (1996). Geodesic saliency of watershed
   contours and hierarchical segmentation. IEEE TPAMI 18(12), 1163-1173.
.. [3] Grimaud, M. (1992). New measure of contrast: the dynamics. Proc. SPIE
   1769 (dynamics of a minimum; depth of its depression).
"""

from __future__ import annotations

import numpy as np

N8 = [(-1, -1), (-1, 0), (-1, 1), (0, -1), (0, 1), (1, -1), (1, 0), (1, 1)]
N4 = [(-1, 0), (0, -1), (0, 1), (1, 0)]


def _find(p, a):
    while p[a] != a:
        p[a] = p[p[a]]
        a = p[a]
    return a


def regions_by_cells(z, kind, merge_level, connectivity=8, edge_outlet=None):
    """Per cell, the region class of the persistence-simplified watershed:
    a cell index naming its class (its representative cell), -1 for the
    outlet's class (no region) and -2 on nodata. Differences of keys are
    taken in ``z``'s dtype (use float32 or float64)."""
    z = np.asarray(z)
    nr, nc = z.shape
    key = (-z if kind == "peaks" else z).reshape(-1)
    valid = np.isfinite(key)
    outlet = (kind == "pits") if edge_outlet is None else edge_outlet
    nbrs = N8 if connectivity == 8 else N4
    n = nr * nc
    out_node = n
    comp = list(range(n + 1))  # component union-find; a root is the component's deepest cell
    region = list(range(n + 1))  # region union-find over cells (out_node: no region)

    def earlier(a, b):
        return key[a] < key[b] or (key[a] == key[b] and a < b)

    def older(a, b):  # component roots; the outlet is the oldest
        return a == out_node or (b != out_node and earlier(a, b))

    def low(root, w):
        return key[root] == key[w] or float(key[w] - key[root]) < merge_level

    def neighbours(i):
        r, c = divmod(i, nc)
        for dr, dc in nbrs:
            if 0 <= r + dr < nr and 0 <= c + dc < nc:
                yield (r + dr) * nc + c + dc
            else:
                yield -1

    def die(young, old, across, w):
        if low(young, w):
            region[_find(region, young)] = _find(region, across)
        comp[young] = old

    order = sorted((i for i in range(n) if valid[i]), key=lambda i: (key[i], i))
    for w in order:
        prior = sorted((j for j in neighbours(w) if j >= 0 and valid[j] and earlier(j, w)),
                       key=lambda j: (key[j], j))
        if prior:
            comp[w] = _find(comp, prior[0])
            region[w] = prior[0]
        cur = _find(comp, w)
        for j in prior[1:]:
            other = _find(comp, j)
            if other == cur:
                continue
            if older(cur, other):
                die(other, cur, w, w)
            else:
                die(cur, other, j, w)
                cur = other
        edge = any(j < 0 or not valid[j] for j in neighbours(w))
        if outlet and edge and cur != out_node:
            die(cur, out_node, out_node, w)
    out = np.full(n, -2, np.int64)
    for i in order:
        root = _find(region, i)
        out[i] = -1 if root == out_node else root
    return out.reshape(nr, nc)


def same_partition(labels, classes):
    """True when engine ``labels`` (0: none or nodata) split the valid cells
    as ``classes`` do (-1: none, -2: nodata), one label per class."""
    labels = np.asarray(labels).reshape(-1)
    classes = np.asarray(classes).reshape(-1)
    v = classes != -2
    if np.any((labels[v] == 0) != (classes[v] == -1)):
        return False
    pairs = set(zip(labels[v].tolist(), classes[v].tolist()))
    return len(pairs) == len({a for a, _ in pairs}) == len({b for _, b in pairs})
