"""Side-by-side speed figures: our engines against plain NumPy references, and the issue targets.

Run ``python benchmarks/compare.py`` (all sections) or ``--only tree`` / ``--only direct``;
``--quick`` shrinks the large cases for a smoke run. Each comparison returns rows of
(case, ours seconds, reference seconds, ratio, target) printed in one table.
"""

from __future__ import annotations

import argparse
import sys
import time
from collections.abc import Callable
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent))
from _cases import facies_ti  # noqa: E402

import strataloom as sl  # noqa: E402

Row = tuple[str, float | None, float | None, str, str]
COMPARISONS: dict[str, Callable[[bool], list[Row]]] = {}


def comparison(name: str) -> Callable:
    def wrap(fn: Callable[[bool], list[Row]]) -> Callable[[bool], list[Row]]:
        COMPARISONS[name] = fn
        return fn

    return wrap


def _timed(fn: Callable[[], object]) -> tuple[float, object]:
    t0 = time.perf_counter()
    out = fn()
    return time.perf_counter() - t0, out


# --------------------------------------------------------------------------- pattern tree
def _numpy_tree_node_times(ti: np.ndarray, offsets: np.ndarray, shape: tuple[int, int], nodes: int,
                           seed: int) -> float:
    """Seconds per node of a NumPy simulation that scans the whole TI for every node's event."""
    rng = np.random.default_rng(seed)
    ny, nx = shape
    sim = np.full(shape, -1, dtype=np.int64)
    path = rng.permutation(ny * nx)[:nodes]
    k = int(ti.max()) + 1
    tny, tnx = ti.shape
    pad = int(np.abs(offsets).max())
    padded = np.full((tny + 2 * pad, tnx + 2 * pad), -2, dtype=np.int64)
    padded[pad:pad + tny, pad:pad + tnx] = ti
    t0 = time.perf_counter()
    for cell in path:
        y, x = divmod(int(cell), nx)
        event = []
        for dy, dx in offsets:
            yy, xx = y + dy, x + dx
            if 0 <= yy < ny and 0 <= xx < nx and sim[yy, xx] >= 0:
                event.append((dy, dx, sim[yy, xx]))
        probs = np.bincount(ti.ravel(), minlength=k).astype(float)
        for kept in range(len(event), 0, -1):
            ok = np.ones(ti.shape, bool)
            for dy, dx, val in event[:kept]:
                ok &= padded[pad + dy:pad + dy + tny, pad + dx:pad + dx + tnx] == val
            counts = np.bincount(ti[ok], minlength=k)
            if counts.sum() > 0:
                probs = counts.astype(float)
                break
        sim[y, x] = rng.choice(k, p=probs / probs.sum())
    return (time.perf_counter() - t0) / nodes


@comparison("tree")
def tree_rows(quick: bool) -> list[Row]:
    rows: list[Row] = []
    # 1. Simulation against a brute-force NumPy TI scan per node (64 x 64 grid, 100 x 100 TI).
    ti2 = facies_ti((1, 100, 100), sigma=(0, 3, 3))[0]
    tpl2 = sl.Template.ellipsoid((0, 4, 4), max_nodes=30)
    tree2 = sl.PatternTree(ti2, tpl2, levels=1)
    ours, _ = _timed(lambda: tree2.simulate((64, 64), seed=1, threads=1))
    ref_per_node = _numpy_tree_node_times(ti2, tpl2.offsets[:, 1:], (64, 64), 100 if quick else 400, seed=1)
    ref = ref_per_node * 64 * 64
    rows.append(("64x64 grid from 100x100 TI, 30 nodes, 1 thread", ours, ref, f"{ref / ours:.0f}x", ">= 1000x"))
    # 2. Build rate and bytes per node.
    shape = (25, 100, 100) if quick else (50, 140, 143)
    ti3 = facies_ti(shape)
    tpl3 = sl.Template.ellipsoid((2, 5, 5), max_nodes=50)
    build, tree3 = _timed(lambda: sl.PatternTree(ti3, tpl3, levels=3))
    inserted = ti3.size * len(tpl3) * 3
    rows.append((f"build {ti3.size:,}-cell TI, 50 nodes, 3 levels", build, None,
                 f"{inserted / build / 1e6:.0f} M nodes/s", "rate"))
    k = tree3.categories
    rows.append((f"bytes per stored node (K={k})", None, None, f"{tree3.bytes_per_node:.1f} B", f"<= {4 * k + 8} B"))
    rows.append(("tree memory, all levels", None, None, f"{tree3.memory_bytes / 2**20:.0f} MiB", "report"))
    # 3. A 1,000,000-cell realization from that TI, 1 and 2 threads.
    grid = (25, 100, 100) if quick else (50, 140, 143)
    t1, _ = _timed(lambda: tree3.simulate(grid, seed=1, threads=1))
    stats = tree3.last_stats
    t2, _ = _timed(lambda: tree3.simulate(grid, seed=1, threads=2))
    cells = int(np.prod(grid))
    rows.append((f"{cells:,}-cell realization, 1 thread", t1, None, f"{t1 / cells * 1e6:.1f} us/cell", "<= 10 s"))
    rows.append((f"{cells:,}-cell realization, 2 threads", t2, t1, f"{t1 / t2:.2f}x speedup", ">= 1.8x"))
    visited = ", ".join(f"{v:.0f}" for v in stats["mean_visited"])
    rows.append(("  engine counter: tree nodes + centres per event, per level", None, None, visited, "report"))
    return rows


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--only", choices=sorted(COMPARISONS), action="append", help="run only these sections")
    ap.add_argument("--quick", action="store_true", help="smaller large cases (a smoke run)")
    args = ap.parse_args(argv)
    names = args.only or list(COMPARISONS)
    print(f"{'case':58s} {'ours s':>9s} {'ref s':>9s}  {'figure':>22s}  target")
    for name in names:
        print(f"-- {name}")
        for case, ours, ref, figure, target in COMPARISONS[name](args.quick):
            o = f"{ours:9.3f}" if ours is not None else " " * 9
            r = f"{ref:9.3f}" if ref is not None else " " * 9
            print(f"{case:58s} {o} {r}  {figure:>22s}  {target}", flush=True)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
