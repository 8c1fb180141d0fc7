"""Benchmark: one pairs() call vs the gudhi reference and vs one np.sort.

Smooth terrains at 512^2, 1024^2, 2048^2 (float32). Times are medians of
>= 3 runs after a warm-up, all measured in this process; the table prints
ratios (gudhi persistence + cofaces / pairs, pairs / np.sort). Extra memory
per cell is the growth of the peak resident set (VmHWM, reset through
/proc/self/clear_refs; Linux only) of a fresh subprocess running one pairs()
call on an array it already holds.

Run:  python bench/bench_pairs.py [--sizes 512,1024,2048] [--repeat 3]
"""

from __future__ import annotations

import argparse
import subprocess
import sys
import tempfile

import numpy as np
from common import median_time, terrain


def gudhi_ref(z):
    import gudhi

    cc = gudhi.CubicalComplex(top_dimensional_cells=z)
    cc.compute_persistence(homology_coeff_field=2, min_persistence=0)
    return cc.cofaces_of_persistence_pairs()


def _mem_child(path, kind):
    from terrain.engine.persistence import pairs

    z = np.load(path)
    pairs(z[:32, :32], kind=kind)
    # Linux: writing 5 to clear_refs resets the peak-RSS mark (VmHWM)
    with open("/proc/self/clear_refs", "w") as fh:
        fh.write("5")
    before = _status_kib("VmRSS")
    pairs(z, kind=kind)
    print((_status_kib("VmHWM") - before) * 1024 / z.size)


def _status_kib(field):
    with open("/proc/self/status") as fh:
        for line in fh:
            if line.startswith(field + ":"):
                return int(line.split()[1])
    raise RuntimeError(field)


def extra_bytes_per_cell(z, kind):
    with tempfile.TemporaryDirectory() as d:
        path = f"{d}/z.npy"
        np.save(path, z)
        out = subprocess.run([sys.executable, __file__, "--mem-child", f"{path},{kind}"],
                             capture_output=True, text=True, check=True)
    return float(out.stdout.strip())


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--sizes", default="512,1024,2048")
    ap.add_argument("--repeat", type=int, default=3)
    ap.add_argument("--mem-child", default=None)
    a = ap.parse_args()
    if a.mem_child:
        path, kind = a.mem_child.split(",")
        _mem_child(path, kind)
        return
    from terrain.engine.persistence import pairs

    print(f"{'side':>6} {'kind':>5} {'pairs s':>8} {'gudhi/pairs':>12} {'pairs/sort':>11} "
          f"{'extra B/cell':>13}")
    for n in (int(s) for s in a.sizes.split(",")):
        z = terrain(n)
        t_sort = median_time(lambda z=z: np.sort(z, axis=None), a.repeat)
        t_gudhi = median_time(lambda z=z: gudhi_ref(z), a.repeat)
        for kind in ("peaks", "pits"):
            t = median_time(lambda z=z, kind=kind: pairs(z, kind=kind), a.repeat)
            mem = extra_bytes_per_cell(z, kind)
            print(f"{n:>5}² {kind:>5} {t:8.3f} {t_gudhi / t:11.1f}x {t / t_sort:10.1f}x {mem:13.1f}",
                  flush=True)


if __name__ == "__main__":
    main()
