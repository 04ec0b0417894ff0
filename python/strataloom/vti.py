"""VTK XML ImageData files (``.vti``): cell arrays of one regular grid, for ParaView and VTK.

The layout follows the VTK XML file format (Kitware, "VTK File Formats", VTK User's Guide): an
``ImageData`` piece with cell data, raw little-endian arrays in one ``AppendedData`` block, each
prefixed by its byte count as a UInt64 (``header_type="UInt64"``). VTK's point extent is ``0..n``
along each axis, and ``Origin``/``Spacing`` are written in VTK's (x, y, z) order. Grid axes
(z, y, x) become VTK's (k, j, i), so cell ``(iz, iy, ix)`` of a C-order ``(nz, ny, nx)`` array is
VTK cell ``ix + nx * (iy + ny * iz)`` and arrays are written without reordering.

This is the one reader and writer of the project; :mod:`strataloom.export` (runs, on a
:class:`~strataloom.grid.Grid`) and :mod:`strataloom.training.io` (training images) call it.
"""

from __future__ import annotations

import os
import xml.etree.ElementTree as ET
from collections.abc import Mapping, Sequence
from pathlib import Path

import numpy as np

from . import _validate as v

__all__ = ["read_image", "read_vti", "write_vti"]

_VTK_TYPES = {
    np.dtype(np.int8): "Int8",
    np.dtype(np.uint8): "UInt8",
    np.dtype(np.int16): "Int16",
    np.dtype(np.uint16): "UInt16",
    np.dtype(np.int32): "Int32",
    np.dtype(np.uint32): "UInt32",
    np.dtype(np.int64): "Int64",
    np.dtype(np.uint64): "UInt64",
    np.dtype(np.float32): "Float32",
    np.dtype(np.float64): "Float64",
}
_NP_TYPES = {name: dt for dt, name in _VTK_TYPES.items()}


def write_vti(
    path: str | Path,
    arrays: Mapping[str, np.ndarray],
    *,
    spacing: Sequence[float] = (1.0, 1.0, 1.0),
    origin: Sequence[float] = (0.0, 0.0, 0.0),
) -> Path:
    """Write cell arrays of one grid to a VTK XML ImageData file.

    Parameters
    ----------
    path : str or Path
        Output file (``.vti``), written under a temporary name in the same folder, then renamed.
    arrays : mapping of name to (nz, ny, nx) or (ny, nx) ndarray
        Cell data; all arrays share one shape. Integer and float arrays keep their type (in
        little-endian order), bool arrays are written as UInt8. The first is the active scalars.
    spacing, origin : sequence of 3 float
        ``(dz, dy, dx)`` and ``(z0, y0, x0)``, written in VTK's (x, y, z) order.

    Returns
    -------
    Path
        The file written.
    """
    o = "write_vti"
    if not arrays:
        raise v.fail("arrays", "at least one named array", dict(arrays), o)
    vols = {str(k): v.as_volume(a, f"arrays[{str(k)!r}]", owner=o) for k, a in arrays.items()}
    shapes = {a.shape for a in vols.values()}
    if len(shapes) != 1:
        raise v.fail("arrays", "arrays of one shape", sorted(shapes), o)
    nz, ny, nx = shapes.pop()
    spc = v.triple(spacing, "spacing", float, owner=o)
    org = v.triple(origin, "origin", float, owner=o)
    root = ET.Element(
        "VTKFile", type="ImageData", version="1.0", byte_order="LittleEndian", header_type="UInt64"
    )
    extent = f"0 {nx} 0 {ny} 0 {nz}"
    img = ET.SubElement(
        root,
        "ImageData",
        WholeExtent=extent,
        Origin=f"{org[2]!r} {org[1]!r} {org[0]!r}",
        Spacing=f"{spc[2]!r} {spc[1]!r} {spc[0]!r}",
    )
    piece = ET.SubElement(img, "Piece", Extent=extent)
    cells = ET.SubElement(piece, "CellData", Scalars=next(iter(vols)))
    blobs = []
    offset = 0
    for name, a in vols.items():
        dt = np.dtype(np.uint8) if a.dtype == np.bool_ else a.dtype.newbyteorder("=")
        if dt not in _VTK_TYPES:
            raise v.fail_type(f"arrays[{name!r}]", "an integer, float or bool array", a, o)
        data = np.ascontiguousarray(a, dtype=dt.newbyteorder("<")).tobytes()
        ET.SubElement(
            cells,
            "DataArray",
            type=_VTK_TYPES[dt],
            Name=name,
            NumberOfComponents="1",
            format="appended",
            offset=str(offset),
        )
        blob = np.uint64(len(data)).astype("<u8").tobytes() + data
        blobs.append(blob)
        offset += len(blob)
    ET.SubElement(piece, "PointData")
    head = ET.tostring(root, encoding="unicode")
    head = head.replace("</VTKFile>", '<AppendedData encoding="raw">\n_')
    p = Path(path)
    tmp = p.with_name(p.name + f".tmp-{os.getpid()}")
    with tmp.open("wb") as f:
        f.write(b'<?xml version="1.0"?>\n')
        f.write(head.encode("ascii", "xmlcharrefreplace"))
        for b in blobs:
            f.write(b)
        f.write(b"\n</AppendedData>\n</VTKFile>\n")
    os.replace(tmp, p)
    return p


def read_image(
    path: str | Path,
) -> tuple[dict[str, np.ndarray], tuple[int, int, int], tuple[float, ...], tuple[float, ...]]:
    """Read a ``.vti`` file written by :func:`write_vti` (raw appended cell data).

    Parameters
    ----------
    path : str or Path
        The ``.vti`` file.

    Returns
    -------
    arrays : dict of name to (nz, ny, nx) ndarray
        The cell arrays, in native byte order.
    shape : tuple of 3 int
        ``(nz, ny, nx)`` from the file's extent.
    spacing, origin : tuple of 3 float
        In (z, y, x) order.
    """
    raw = Path(path).read_bytes()
    start = raw.find(b"<AppendedData")
    root = img = None
    if start >= 0:
        root = ET.fromstring(raw[:start].decode("ascii") + "</VTKFile>")
        img = root.find("ImageData")
    if (
        root is None
        or img is None
        or root.get("type") != "ImageData"
        or root.get("header_type") != "UInt64"
    ):
        raise v.fail(
            "path", "a .vti ImageData file with UInt64 headers and appended data", str(path),
            "read_vti",
        )
    body = raw.index(b"_", raw.index(b">", start)) + 1
    ext = [int(x) for x in img.get("WholeExtent", "").split()]
    nx, ny, nz = ext[1] - ext[0], ext[3] - ext[2], ext[5] - ext[4]
    sx, sy, sz = (float(x) for x in img.get("Spacing", "1 1 1").split())
    ox, oy, oz = (float(x) for x in img.get("Origin", "0 0 0").split())
    out = {}
    for da in img.iter("DataArray"):
        pos = body + int(da.get("offset", "0"))
        n = int(np.frombuffer(raw, dtype="<u8", count=1, offset=pos)[0])
        dt = _NP_TYPES[da.get("type", "")].newbyteorder("<")
        a = np.frombuffer(raw, dtype=dt, count=n // dt.itemsize, offset=pos + 8)
        out[da.get("Name", "")] = a.astype(dt.newbyteorder("=")).reshape(nz, ny, nx)
    return out, (nz, ny, nx), (sz, sy, sx), (oz, oy, ox)


def read_vti(
    path: str | Path,
) -> tuple[dict[str, np.ndarray], tuple[float, ...], tuple[float, ...]]:
    """Read a ``.vti`` file written by :func:`write_vti`: :func:`read_image` without the shape.

    Parameters
    ----------
    path : str or Path
        The ``.vti`` file.

    Returns
    -------
    arrays, spacing, origin
        As in :func:`read_image`.
    """
    arrays, _, spacing, origin = read_image(path)
    return arrays, spacing, origin
