"""Writing training images: .npy arrays, VTK ImageData (.vti, XML) and a PNG of sections.

The ``.vti`` reader and writer are the project's one implementation in :mod:`strataloom.vti`,
re-exported here (``spacing``/``origin`` keywords, several named cell arrays, int and float types).
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from pathlib import Path
from typing import Any

import numpy as np

from .. import _validate as v
from ..vti import read_vti, write_vti

__all__ = ["read_vti", "write_sections_png", "write_vti"]


def write_sections_png(path: str | Path, facies: np.ndarray, *,
                       properties: Mapping[str, np.ndarray] | None = None,
                       spacing: Sequence[float] = (1.0, 1.0, 1.0),
                       facies_names: Sequence[str] = (), title: str = "") -> Path:
    """A PNG of sections through the middle of the grid, facies (and properties) side by side.

    A 3-D grid shows the horizontal section at mid height (true scale) and the vertical sections
    at mid y and mid x (stretched to the panel: vertical exaggeration); a plan view (nz = 1) shows
    the map. Each property adds a row. Matplotlib (Agg backend)
    is imported here only.
    """
    import matplotlib

    matplotlib.use("Agg", force=False)
    import matplotlib.pyplot as plt
    from matplotlib.colors import BoundaryNorm, ListedColormap

    fac = v.as_volume(facies, "facies", owner="write_sections_png")
    props = dict(properties or {})
    nz, ny, nx = fac.shape
    dz, dy, dx = v.triple(spacing, "spacing", float, owner="write_sections_png")
    k = int(max(fac.max(), 0)) + 1
    base = plt.get_cmap("tab10" if k <= 10 else "tab20")
    cmap = ListedColormap([base(i % base.N) for i in range(k)])
    norm = BoundaryNorm(np.arange(-0.5, k + 0.5), k)

    def sections(a: np.ndarray) -> list[tuple[str, np.ndarray, list[float], str, str]]:
        if nz == 1:
            return [("map", a[0], [0, nx * dx, 0, ny * dy], "x", "y")]
        return [(f"z layer {nz // 2}", a[nz // 2], [0, nx * dx, 0, ny * dy], "x", "y"),
                (f"y row {ny // 2}", a[:, ny // 2, :], [0, nx * dx, 0, nz * dz], "x", "z"),
                (f"x column {nx // 2}", a[:, :, nx // 2], [0, ny * dy, 0, nz * dz], "y", "z")]

    rows = 1 + len(props)
    cols = len(sections(fac))
    fig, axes = plt.subplots(rows, cols, figsize=(4.2 * cols + 1.2, 3.6 * rows), squeeze=False,
                             constrained_layout=True)
    for j, (name, sec, ext, xl, yl) in enumerate(sections(fac)):
        ax = axes[0, j]
        im = ax.imshow(np.ma.masked_less(sec, 0), origin="lower", extent=ext, cmap=cmap, norm=norm,
                       interpolation="nearest", aspect="equal" if yl == "y" else "auto")
        ax.set_title(f"facies, {name}", fontsize=9)
        ax.set_xlabel(xl)
        ax.set_ylabel(yl)
    bar = fig.colorbar(im, ax=axes[0, :].tolist(), ticks=np.arange(k), shrink=0.9)
    labels = [f"{i} {facies_names[i]}" if i < len(facies_names) else str(i) for i in range(k)]
    bar.ax.set_yticklabels(labels, fontsize=8)
    for r, (pname, arr) in enumerate(props.items(), 1):
        pv = v.as_volume(arr, f"properties[{pname!r}]", owner="write_sections_png")
        finite = pv[np.isfinite(pv)]
        lo, hi = (float(finite.min()), float(finite.max())) if finite.size else (0.0, 1.0)
        for j, (name, sec, ext, xl, yl) in enumerate(sections(pv)):
            ax = axes[r, j]
            im = ax.imshow(sec, origin="lower", extent=ext, cmap="viridis", vmin=lo, vmax=hi,
                           interpolation="nearest", aspect="equal" if yl == "y" else "auto")
            ax.set_title(f"{pname}, {name}", fontsize=9)
            ax.set_xlabel(xl)
            ax.set_ylabel(yl)
        fig.colorbar(im, ax=axes[r, :].tolist(), shrink=0.9)
    if title:
        fig.suptitle(title, fontsize=10)
    p = Path(path)
    fig.savefig(p, dpi=90)
    plt.close(fig)
    return p


def _npy(path: Path, a: Any) -> Path:
    np.save(path, np.ascontiguousarray(a))
    return path
