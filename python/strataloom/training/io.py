"""Writing training images: .npy arrays, VTK ImageData (.vti, XML) and a PNG of sections.

The .vti writer follows the VTK XML file format (Kitware, "VTK File Formats", VTK User's Guide):
an ``ImageData`` piece with cell data, raw binary arrays in an ``AppendedData`` block, each prefixed
by its byte count as a UInt64. Grid axes (z, y, x) become VTK's (k, j, i), so a C-order
``(nz, ny, nx)`` array is written as is.
"""

from __future__ import annotations

import xml.etree.ElementTree as ET
from collections.abc import Mapping, Sequence
from pathlib import Path
from typing import Any

import numpy as np

from .. import _validate as v

__all__ = ["read_vti", "write_sections_png", "write_vti"]

_VTK_TYPES = {
    np.dtype(np.int8): "Int8", np.dtype(np.uint8): "UInt8", np.dtype(np.int16): "Int16",
    np.dtype(np.uint16): "UInt16", np.dtype(np.int32): "Int32", np.dtype(np.uint32): "UInt32",
    np.dtype(np.int64): "Int64", np.dtype(np.uint64): "UInt64", np.dtype(np.float32): "Float32",
    np.dtype(np.float64): "Float64",
}
_NP_TYPES = {name: dt for dt, name in _VTK_TYPES.items()}


def write_vti(path: str | Path, arrays: Mapping[str, np.ndarray], *,
              spacing: Sequence[float] = (1.0, 1.0, 1.0),
              origin: Sequence[float] = (0.0, 0.0, 0.0)) -> Path:
    """Write cell arrays of one grid to a VTK XML ImageData file.

    Parameters
    ----------
    path : str or Path
        Output file (``.vti``).
    arrays : mapping of name to (nz, ny, nx) ndarray
        Cell data; all arrays share one shape. The first is the active scalars.
    spacing, origin : sequence of 3 float
        ``(dz, dy, dx)`` and ``(z0, y0, x0)``, written in VTK's (x, y, z) order.

    Returns
    -------
    Path
    """
    o = "write_vti"
    if not arrays:
        raise v.fail("arrays", "at least one named array", arrays, o)
    vols = {str(k): v.as_volume(a, f"arrays[{k!r}]", owner=o) for k, a in arrays.items()}
    shapes = {a.shape for a in vols.values()}
    if len(shapes) != 1:
        raise v.fail("arrays", "arrays of one shape", sorted(shapes), o)
    nz, ny, nx = shapes.pop()
    spc = v.triple(spacing, "spacing", float, owner=o)
    org = v.triple(origin, "origin", float, owner=o)
    blobs = []
    root = ET.Element("VTKFile", type="ImageData", version="1.0", byte_order="LittleEndian",
                      header_type="UInt64")
    img = ET.SubElement(root, "ImageData", WholeExtent=f"0 {nx} 0 {ny} 0 {nz}",
                        Origin=f"{org[2]!r} {org[1]!r} {org[0]!r}",
                        Spacing=f"{spc[2]!r} {spc[1]!r} {spc[0]!r}")
    piece = ET.SubElement(img, "Piece", Extent=f"0 {nx} 0 {ny} 0 {nz}")
    cd = ET.SubElement(piece, "CellData", Scalars=next(iter(vols)))
    offset = 0
    for name, a in vols.items():
        dt = np.dtype(a.dtype)
        if dt == np.bool_:
            dt = np.dtype(np.uint8)
        if dt.newbyteorder("=") not in _VTK_TYPES:
            raise v.fail_type(f"arrays[{name!r}]", "an integer or float array", a, o)
        dt = dt.newbyteorder("=")
        data = np.ascontiguousarray(a, dtype=dt.newbyteorder("<")).tobytes()
        ET.SubElement(cd, "DataArray", type=_VTK_TYPES[dt], Name=name, NumberOfComponents="1",
                      format="appended", offset=str(offset))
        blob = np.uint64(len(data)).astype("<u8").tobytes() + data
        blobs.append(blob)
        offset += len(blob)
    ET.SubElement(piece, "PointData")
    head = ET.tostring(root, encoding="unicode")
    head = head.replace("</VTKFile>", '<AppendedData encoding="raw">\n_')
    p = Path(path)
    with p.open("wb") as f:
        f.write(b'<?xml version="1.0"?>\n')
        f.write(head.encode("ascii"))
        for b in blobs:
            f.write(b)
        f.write(b"\n</AppendedData>\n</VTKFile>\n")
    return p


def read_vti(path: str | Path,
             ) -> tuple[dict[str, np.ndarray], tuple[float, ...], tuple[float, ...]]:
    """Read a .vti written by `write_vti` (raw appended cell data).

    Returns
    -------
    arrays : dict of name to (nz, ny, nx) ndarray
    spacing, origin : tuple of 3 float, in (z, y, x) order
    """
    raw = Path(path).read_bytes()
    start = raw.index(b'<AppendedData encoding="raw">')
    under = raw.index(b"_", start) + 1
    head = raw[:start].decode("ascii") + "</VTKFile>"
    root = ET.fromstring(head)
    img = root.find("ImageData")
    if img is None or root.get("header_type") != "UInt64":
        raise v.fail("path", "a .vti file of ImageData with UInt64 headers", str(path), "read_vti")
    ext = [int(x) for x in img.get("WholeExtent", "").split()]
    nx, ny, nz = ext[1] - ext[0], ext[3] - ext[2], ext[5] - ext[4]
    sx, sy, sz = (float(x) for x in img.get("Spacing", "1 1 1").split())
    ox, oy, oz = (float(x) for x in img.get("Origin", "0 0 0").split())
    out = {}
    for da in img.iter("DataArray"):
        pos = under + int(da.get("offset", "0"))
        n = int(np.frombuffer(raw, dtype="<u8", count=1, offset=pos)[0])
        dt = _NP_TYPES[da.get("type", "")].newbyteorder("<")
        a = np.frombuffer(raw, dtype=dt, count=n // dt.itemsize, offset=pos + 8)
        out[da.get("Name", "")] = a.astype(dt.newbyteorder("=")).reshape(nz, ny, nx)
    return out, (sz, sy, sx), (oz, oy, ox)


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
