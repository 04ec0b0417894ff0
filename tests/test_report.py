"""The HTML report, the exports and the CLI subcommands."""

from __future__ import annotations

import base64
import csv
import json
import xml.etree.ElementTree as ET
from html.parser import HTMLParser

import numpy as np
import pytest

import strataloom as sl
from storehelp import write_store
from strataloom.cli import main
from strataloom.export import read_vti, write_vti
from strataloom.qc import check_run
from strataloom.report import CAUTIONS, build_report
from strataloom.summary import open_summary, summarize

RNG = np.random.default_rng(3)
VOID = {"meta", "img", "br", "hr", "input", "link"}


class _Checker(HTMLParser):
    """Strict enough HTML check: every non-void tag closed in order; collects images and text."""

    def __init__(self):
        super().__init__()
        self.stack, self.images, self.figures, self.text, self.errors = [], [], [], [], []
        self.refs = []

    def handle_starttag(self, tag, attrs):
        a = dict(attrs)
        if tag == "img":
            self.images.append(a.get("src", ""))
        if tag == "figure":
            self.figures.append(a.get("data-figure"))
        for key in ("src", "href"):
            if key in a and a[key] and not a[key].startswith(("data:", "#")):
                self.refs.append(a[key])
        if tag not in VOID:
            self.stack.append(tag)

    def handle_endtag(self, tag):
        if not self.stack or self.stack[-1] != tag:
            self.errors.append(f"unexpected </{tag}> with open {self.stack[-3:]}")
        else:
            self.stack.pop()

    def handle_data(self, data):
        self.text.append(data)


def _run(tmp_path, n=6):
    shape = (3, 14, 16)
    facies = RNG.integers(0, 3, (n, *shape)).astype(np.int16)
    poro = RNG.random((n, *shape)).astype(np.float32)
    cells = np.array([[z, 3, 3] for z in range(3)] + [[z, 10, 12] for z in range(3)])
    vals = facies[0][cells[:, 0], cells[:, 1], cells[:, 2]]
    facies[:, cells[:, 0], cells[:, 1], cells[:, 2]] = vals
    write_store(
        tmp_path,
        {"facies": facies, "porosity": poro},
        hard={"cells": cells, "values_facies": vals},
        soft=np.stack([(facies == c).mean(0) for c in range(3)]),
    )
    return facies, poro, RNG.integers(0, 3, (4, 24, 24)).astype(np.int16)


def test_report_parses_embeds_every_figure_and_names_every_verdict(tmp_path):
    _, _, ti = _run(tmp_path)
    qc = check_run(
        tmp_path,
        ti=ti,
        baseline=True,
        baseline_count=2,
        source_maps={0: RNG.integers(0, ti.size, (3, 14, 16))},
    )
    out = build_report(tmp_path, ti=ti, qc=qc)
    assert out == tmp_path / "report.html" and not list(tmp_path.glob("report.html.tmp*"))
    page = out.read_text(encoding="utf-8")
    chk = _Checker()
    chk.feed(page)
    chk.close()
    assert chk.errors == [] and chk.stack == []
    assert chk.refs == []  # self-contained: no external file, script or style
    expected = {
        "realizations-facies",
        "summary-facies",
        "well-connection-facies",
        "summary-porosity",
        "proportions",
        "soft-agreement",
        "variograms",
        "connectivity",
        "patterns",
        "measure",
    }
    assert set(chk.figures) == expected and len(chk.images) == len(chk.figures)
    for src in chk.images:
        assert src.startswith("data:image/png;base64,")
        assert base64.b64decode(src.split(",", 1)[1])[:8] == b"\x89PNG\r\n\x1a\n"
    text = " ".join(chk.text)
    for d in qc.verdicts:
        assert d["check"] in text and d["verdict"] in text
    assert "Copy diagnostics" in text
    for c in CAUTIONS:
        assert c in text
    assert "0" * 64 in text  # input hash in the provenance table


def test_vti_round_trip_and_xml_structure(tmp_path):
    grid = sl.Grid((3, 4, 5), spacing=(0.5, 2.0, 3.0), origin=(10.0, 20.0, 30.0))
    arrays = {
        "facies": RNG.integers(0, 3, grid.shape).astype(np.int16),
        "p sand": RNG.random(grid.shape).astype(np.float32),
        "mask": RNG.random(grid.shape) > 0.5,
        "big": RNG.random(grid.shape).astype(">f8"),
    }
    f = write_vti(tmp_path / "a.vti", arrays, grid)
    back, g2 = read_vti(f)
    assert g2 == grid
    for k, a in arrays.items():
        np.testing.assert_array_equal(back[k], a)
    raw = f.read_bytes()
    head = raw[: raw.index(b"<AppendedData")].decode() + "</VTKFile>"
    root = ET.fromstring(head)  # VTK XML file format: ImageData, point extents 0..n, x y z order
    img = root.find("ImageData")
    assert root.get("type") == "ImageData" and img.get("WholeExtent") == "0 5 0 4 0 3"
    assert img.get("Origin") == "30.0 20.0 10.0" and img.get("Spacing") == "3.0 2.0 0.5"
    types = {d.get("Name"): d.get("type") for d in img.iter("DataArray")}
    assert types == {"facies": "Int16", "p sand": "Float32", "mask": "UInt8", "big": "Float64"}


def test_vti_reads_back_with_vtk(tmp_path):
    vtk = pytest.importorskip("vtk")
    from vtk.util.numpy_support import vtk_to_numpy

    grid = sl.Grid((2, 3, 4), spacing=(1.0, 2.0, 3.0), origin=(5.0, 6.0, 7.0))
    a = np.arange(24, dtype=np.int16).reshape(grid.shape)
    f = write_vti(tmp_path / "a.vti", {"facies": a}, grid)
    reader = vtk.vtkXMLImageDataReader()  # VTK's own reader (reference library)
    reader.SetFileName(str(f))
    reader.Update()
    img = reader.GetOutput()
    assert img.GetDimensions() == (5, 4, 3)
    assert img.GetOrigin() == (7.0, 6.0, 5.0) and img.GetSpacing() == (3.0, 2.0, 1.0)
    got = vtk_to_numpy(img.GetCellData().GetArray("facies"))
    np.testing.assert_array_equal(got.reshape(grid.shape), a)
    # cell (iz, iy, ix) = (1, 2, 3) is VTK cell ix + nx * (iy + ny * iz)
    assert got[3 + 4 * (2 + 3 * 1)] == a[1, 2, 3]


def test_exports_round_trip(tmp_path):
    facies, poro, _ = _run(tmp_path)
    summarize(tmp_path)
    files = sl.export_run(tmp_path, "npy", realizations="1,4")
    np.testing.assert_array_equal(np.load(tmp_path / "export" / "facies_0004.npy"), facies[4])
    np.testing.assert_array_equal(np.load(tmp_path / "export" / "porosity_0001.npy"), poro[1])
    ds = open_summary(tmp_path)
    np.testing.assert_array_equal(
        np.load(tmp_path / "export" / "summary_facies_entropy.npy"), ds["facies_entropy"].values
    )
    assert any(f.name == "summary_facies_p_channel_sand.npy" for f in files)
    vt = sl.export_run(tmp_path, "vti", realizations=[2], out=tmp_path / "v")
    back, _ = read_vti(vt[0])
    np.testing.assert_array_equal(back["facies"], facies[2])
    summ, _ = read_vti(tmp_path / "v" / "summary.vti")
    np.testing.assert_allclose(summ["porosity_p50"], np.quantile(poro, 0.5, axis=0), rtol=1e-6)
    sl.export_run(tmp_path, "csv")
    with open(tmp_path / "export" / "realizations.csv", encoding="utf-8") as fh:
        rows = list(csv.DictReader(fh))
    assert [int(r["realization"]) for r in rows] == list(range(6))
    assert [int(r["seed"]) for r in rows] == list(range(100, 106))
    share = [float(r["facies share channel sand"]) for r in rows]
    np.testing.assert_allclose(share, [np.mean(f == 1) for f in facies], rtol=1e-5)
    with open(tmp_path / "export" / "percentiles.csv", encoding="utf-8") as fh:
        pct = {r["quantity"]: r for r in csv.DictReader(fh)}
    assert float(pct["facies share channel sand"]["P50"]) == pytest.approx(
        np.median(share), rel=1e-5
    )
    with pytest.raises(sl.ParameterError, match="'format'"):
        sl.export_run(tmp_path, "vtk")


def test_cli_subcommands(tmp_path, capsys):
    _, _, ti = _run(tmp_path)
    np.save(tmp_path / "ti.npy", ti)
    # the report computes the summary when it is missing
    assert main(["report", str(tmp_path), "--ti", str(tmp_path / "ti.npy")]) == 0
    assert (tmp_path / "summary.zarr").is_dir()
    assert "Pattern histograms against the TI" in (tmp_path / "report.html").read_text(
        encoding="utf-8"
    )
    assert main(["summarize", str(tmp_path), "--memory-mb", "0.01"]) == 0
    assert "summary.zarr" in capsys.readouterr().out
    assert main(["export", str(tmp_path), "--format", "csv"]) == 0
    assert "percentiles.csv" in capsys.readouterr().out
    assert main(["export", str(tmp_path), "--format", "vti", "--realizations", "all"]) == 0
    assert len(list((tmp_path / "export").glob("realization_*.vti"))) == 6
    capsys.readouterr()
    assert main(["export", str(tmp_path), "--format", "npy", "--realizations", "x"]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "'realizations'" in err[0]
    assert main(["report", str(tmp_path / "missing")]) == 2
    assert "no realizations.zarr" in capsys.readouterr().err
    meta = json.loads(open_summary(tmp_path).attrs["strataloom"])
    assert meta["quantiles"] == [0.1, 0.5, 0.9]
