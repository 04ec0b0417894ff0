"""Writing TIs (.npy, .vti, PNG) and the `strataloom ti` command line."""

import json
import subprocess
import sys
import xml.etree.ElementTree as ET

import numpy as np
import pytest

from strataloom.cli import main
from strataloom.training import TrainingImage, read_vti, write_sections_png, write_vti
from test_training_spec import SMALL


def test_vti_layout_follows_the_vtk_xml_format(tmp_path):
    # VTK XML ImageData rules (Kitware, "VTK File Formats", VTK User's Guide): WholeExtent counts
    # points (cells + 1 per axis, written "x0 x1 y0 y1 z0 z1"), Origin/Spacing in x y z order,
    # raw appended data after "_", each block prefixed by its byte count (UInt64 header_type).
    fac = np.arange(2 * 3 * 4, dtype=np.int8).reshape(2, 3, 4)
    por = np.linspace(0, 1, 24, dtype=np.float32).reshape(2, 3, 4)
    p = write_vti(tmp_path / "t.vti", {"facies": fac, "porosity": por}, spacing=(0.5, 2.0, 3.0),
                  origin=(10.0, 20.0, 30.0))
    raw = p.read_bytes()
    head = raw[: raw.index(b"<AppendedData")].decode() + "</VTKFile>"
    root = ET.fromstring(head.split("?>", 1)[1])
    img = root.find("ImageData")
    assert root.get("type") == "ImageData" and root.get("header_type") == "UInt64"
    assert img.get("WholeExtent") == "0 4 0 3 0 2"
    assert [float(x) for x in img.get("Spacing").split()] == [3.0, 2.0, 0.5]
    assert [float(x) for x in img.get("Origin").split()] == [30.0, 20.0, 10.0]
    arrays = img.findall("./Piece/CellData/DataArray")
    assert [(a.get("Name"), a.get("type")) for a in arrays] == [("facies", "Int8"),
                                                              ("porosity", "Float32")]
    start = raw.index(b"_", raw.index(b"<AppendedData")) + 1
    assert int(np.frombuffer(raw[start:start + 8], "<u8")[0]) == fac.nbytes
    # cell (k, j, i) = (z, y, x) is at flat index i + nx (j + ny k), x fastest
    assert raw[start + 8: start + 8 + fac.nbytes] == fac.tobytes()
    back, spacing, origin = read_vti(p)
    assert np.array_equal(back["facies"], fac) and np.array_equal(back["porosity"], por)
    assert spacing == (0.5, 2.0, 3.0) and origin == (10.0, 20.0, 30.0)


def test_png_of_sections_is_a_png(tmp_path):
    import matplotlib.image as mpimg  # reference reader: matplotlib's PNG decoder

    fac = (np.random.default_rng(0).random((6, 20, 30)) < 0.4).astype(np.int8)
    p = write_sections_png(tmp_path / "s.png", fac, properties={"phi": fac * 0.2 + 0.05},
                           facies_names=["mud", "sand"])
    assert p.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    img = mpimg.imread(p)
    assert img.ndim == 3 and img.shape[0] > 200 and img.shape[1] > 400
    assert img[..., :3].std() > 0.05  # not blank


def test_save_writes_all_outputs(tmp_path):
    fac = np.zeros((2, 4, 5), np.int8)
    ti = TrainingImage(fac, {"phi": np.ones(fac.shape, np.float32)}, (1.0, 2.0, 2.0))
    out = ti.save(tmp_path / "o", png=False)
    assert set(out) == {"facies", "phi", "vti", "json"}
    assert np.array_equal(np.load(out["facies"]), fac)
    assert json.loads(out["json"].read_text())["spacing"] == [1.0, 2.0, 2.0]


def test_cli_build_stats_rank(tmp_path, capsys):
    spec = tmp_path / "ti.toml"
    spec.write_text(SMALL, encoding="utf-8")
    assert main(["ti", "build", str(spec), "--out", str(tmp_path / "out")]) == 0
    out = capsys.readouterr().out
    assert "achieved" in out and "wrote vti" in out
    for name in ("ti_facies.npy", "ti_porosity.npy", "ti.vti", "ti_sections.png", "ti.json"):
        assert (tmp_path / "out" / name).is_file()
    assert main(["ti", "stats", str(tmp_path / "out" / "ti.vti")]) == 0
    assert "largest body" in capsys.readouterr().out
    assert main(["ti", "stats", str(tmp_path / "out" / "ti_facies.npy"), "--json"]) == 0
    assert "variograms" in json.loads(capsys.readouterr().out)
    fac = np.load(tmp_path / "out" / "ti_facies.npy")
    rows = ["well,facies"] + [f"w{j},{c}" for j in range(3) for c in fac[:, 5 + 9 * j, 7]]
    (tmp_path / "wells.csv").write_text("\n".join(rows) + "\n", encoding="utf-8")
    other = tmp_path / "flat.npy"
    np.save(other, np.zeros_like(fac))
    assert main(["ti", "rank", "--wells", str(tmp_path / "wells.csv"),
                 str(tmp_path / "out" / "ti_facies.npy"), str(other)]) == 0
    table = capsys.readouterr().out
    assert table.splitlines()[1].split()[:2] == ["1", "ti_facies"]


@pytest.mark.parametrize("edit", [("width = { uniform = [60.0, 100.0] }", "width = -5.0"),
                                  ("proportion = 0.1", "proportion = 0.9")])
def test_cli_bad_spec_is_one_line_with_key_and_line(tmp_path, edit):
    spec = tmp_path / "bad.toml"
    spec.write_text(SMALL.replace(*edit), encoding="utf-8")
    res = subprocess.run([sys.executable, "-m", "strataloom", "ti", "build", str(spec), "--out",
                          str(tmp_path / "o")], capture_output=True, text=True, check=False)
    assert res.returncode == 2
    lines = res.stderr.strip().splitlines()
    assert len(lines) == 1 and "bad.toml, line " in lines[0] and ", key " in lines[0]
    assert not (tmp_path / "o").exists()


def test_vti_reads_back_in_vtk(tmp_path):
    # reference library: VTK's own vtkXMLImageDataReader (the reader ParaView uses); skipped where
    # the vtk package is not installed (it is not a dependency of the project)
    vtk = pytest.importorskip("vtk")
    from vtk.util.numpy_support import vtk_to_numpy

    fac = (np.random.default_rng(1).random((3, 5, 7)) * 4).astype(np.int8)
    por = np.random.default_rng(2).random((3, 5, 7)).astype(np.float32)
    p = write_vti(tmp_path / "r.vti", {"facies": fac, "porosity": por}, spacing=(0.5, 2.0, 4.0),
                  origin=(1.0, 2.0, 3.0))
    reader = vtk.vtkXMLImageDataReader()
    reader.SetFileName(str(p))
    reader.Update()
    img = reader.GetOutput()
    assert img.GetDimensions() == (8, 6, 4) and img.GetNumberOfCells() == fac.size
    assert img.GetSpacing() == (4.0, 2.0, 0.5) and img.GetOrigin() == (3.0, 2.0, 1.0)
    cd = img.GetCellData()
    assert np.array_equal(vtk_to_numpy(cd.GetArray("facies")).reshape(fac.shape), fac)
    assert np.array_equal(vtk_to_numpy(cd.GetArray("porosity")).reshape(fac.shape), por)
    assert vtk_to_numpy(cd.GetArray("facies"))[img.ComputeCellId([6, 4, 2])] == fac[2, 4, 6]
