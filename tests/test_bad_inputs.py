"""The catalogue of bad inputs (docs/bad-inputs.md): each gives one clear error naming the input.

Cases already covered elsewhere (tests/test_tree_errors.py, test_direct_errors.py, test_study.py,
test_wells.py, test_summary.py, test_cli.py) are not repeated. Through the Python API a case raises
one of the project's error classes with a message naming the input; through the CLI it exits with
code 2 and prints one line without a traceback. Data here are invented for the tests.
"""

from __future__ import annotations

import re
from pathlib import Path

import numpy as np
import pytest

import strataloom as sl
from storehelp import write_store
from strataloom.cli import main
from study_helpers import write_small_study

TI = np.tile([[0, 1, 2, 1]], (12, 3))
TPL = sl.Template.box((0, 1, 1))
CONT = np.random.default_rng(0).normal(size=(12, 12))
ERRORS = (sl.ParameterError, sl.ParameterTypeError, sl.MemoryLimitError, sl.StudyError)


def _tree():
    return sl.PatternTree(TI, TPL)


def _direct(ti=CONT, **kw):
    return sl.DirectSampler(ti, **kw)


def _with_memory(memory, call):
    """``call`` on a machine said to have ``memory`` bytes (so the case does not depend on this one)."""
    from strataloom import _validate

    def run():
        with pytest.MonkeyPatch.context() as mp:
            mp.setattr(_validate, "physical_memory", lambda: memory)
            return call()
    return run


TI3 = np.random.default_rng(1).normal(size=(20, 60, 60))


# (id, call, exception class, pattern naming the input and, where it is not implied, the fix)
API_CASES = [
    # --- arrays
    ("tree-ti-ragged-list", lambda: sl.PatternTree([[0, 1], [1]], TPL), sl.ParameterError,
     r"'training_image' .* 2-D .* or 3-D .*numpy cannot turn into one array"),
    ("tree-ti-bool", lambda: sl.PatternTree(TI > 0, TPL), sl.ParameterTypeError,
     r"'training_image' .* integer array of category codes.*dtype bool"),
    ("tree-ti-text", lambda: sl.PatternTree(np.array([["a", "b"], ["c", "d"]]), TPL),
     sl.ParameterTypeError, r"'training_image' .* integer array"),
    ("tree-ti-4d", lambda: sl.PatternTree(np.zeros((2, 2, 2, 2), int), TPL), sl.ParameterError,
     r"'training_image' .* 2-D \(ny, nx\) or 3-D .* shape \(2, 2, 2, 2\)"),
    ("tree-ti-none", lambda: sl.PatternTree(None, TPL), sl.ParameterError, r"'training_image'"),
    ("tree-hard-bool", lambda: _tree().simulate((4, 5), hard=np.zeros((4, 5), bool)),
     sl.ParameterTypeError, r"'hard' .* integer array of codes \(-1 = unknown\)"),
    ("tree-soft-inf", lambda: _tree().simulate((4, 5), soft=np.full((3, 4, 5), np.inf)),
     sl.ParameterError, r"'soft' .* probabilities in \[0, 1\]"),
    ("tree-soft-wrong-ndim", lambda: _tree().simulate((4, 5), soft=np.full((3, 5), 1 / 3)),
     sl.ParameterError, r"'soft' .* shape \(K, nz, ny, nx\) = \(3, 1, 4, 5\)"),
    ("tree-grid-over-memory", _with_memory(2**30, lambda: _tree().simulate((3000, 3000, 3000))),
     sl.MemoryLimitError, r"'shape' .* 27,000,000,000 cells .* 402.3 GiB, more than the 1.0 GiB.*smaller grid"),
    ("tree-grid-over-2**40-cells", lambda: _tree().simulate((100000, 100000, 100000)),
     (sl.ParameterError, sl.MemoryLimitError), r"'shape'"),
    ("direct-ti-complex", lambda: _direct(np.zeros((6, 6), complex)).simulate((4, 4)),
     sl.ParameterTypeError, r"'training_image' .* real numeric array.*complex"),
    ("direct-ti-text", lambda: _direct(np.array([["a", "b"], ["c", "d"]])).simulate((4, 4)),
     sl.ParameterTypeError, r"'training_image' .* numeric array"),
    ("direct-ti-1d", lambda: _direct(np.zeros(6)).simulate((4, 4)), sl.ParameterError,
     r"'training_image' .* 2-D .* shape \(6,\)"),
    ("direct-ti-4d", lambda: _direct(np.zeros((2, 2, 2, 2))).simulate((4, 4)), sl.ParameterError,
     r"'training_image' .* 3-D"),
    ("direct-ti-empty", lambda: _direct(np.zeros((0, 6))).simulate((4, 4)), sl.ParameterError,
     r"'training_image' .* non-empty array"),
    ("direct-ti-some-inf", lambda: _direct(np.where(np.eye(6) > 0, np.inf, 1.0)).simulate((4, 4)),
     sl.ParameterError, r"'training_image' .* finite values or NaN \(masked\)"),
    ("direct-ti-huge-codes", lambda: _direct(np.full((6, 6), 2**30, np.int64)).simulate((4, 4)),
     sl.ParameterError, r"'training_image' .* codes in \[0, 16777215\]"),
    ("direct-ti-empty-mapping", lambda: _direct({}).simulate((4, 4)), sl.ParameterError,
     r"'training_image' .* non-empty mapping"),
    ("direct-ti-int-key", lambda: _direct({1: CONT}).simulate((4, 4)), sl.ParameterTypeError,
     r"'training_image' .* str keys"),
    ("direct-grid-over-memory", _with_memory(2**30, lambda: _direct().simulate((3000, 3000, 3000))),
     sl.MemoryLimitError, r"'shape' of DirectSampler.simulate .* 704.1 GiB, more than the 1.0 GiB.*smaller grid"),
    # the TI padded for the turned and stretched search window: (12 + 2 * 44)**2 cells of 13 bytes
    ("direct-affinity-padded-over-memory",
     _with_memory(40_000, lambda: _direct().simulate((4, 4), affinity=0.25)), sl.MemoryLimitError,
     r"'affinity' of DirectSampler.simulate .* 10,000 cells .* 136.7 KiB, more than the 39.1 KiB .*"
     r"use affinity factors of at least 0.5\d"),
    ("direct-affinity-padded-over-cells",
     lambda: _direct(TI3, search_radius=(3, 10, 10)).simulate((4, 8, 8), affinity=0.004), sl.MemoryLimitError,
     r"'affinity' .* reaching \(750, 2500, 2500\) cells, .* over the limit of 2,000,000,000 cells; "
     r"use affinity factors of at least 0.012"),
    ("direct-affinity-padded-beyond-reach",
     lambda: _direct(TI3, search_radius=(3, 10, 10)).simulate((4, 8, 8), affinity=(16, 16, 0.002)),
     sl.MemoryLimitError, r"'affinity' .* beyond the largest padding of 4096 cells; use affinity factors of at least"),
    ("direct-rotation-padded-over-memory",
     _with_memory(20_000, lambda: _direct().simulate((4, 4), rotation=45)), sl.MemoryLimitError,
     r"'search_radius' of DirectSampler gives .* use a smaller search_radius"),
    ("direct-hard-text", lambda: _direct().simulate((4, 4), hard=np.full((4, 4), "a")),
     sl.ParameterTypeError, r"'hard' .* numeric array"),
    # --- parameters
    ("tree-levels-out-of-range", lambda: sl.PatternTree(TI, TPL, levels=20), sl.ParameterError,
     r"'levels' .* \[1, 12\]"),
    ("tree-levels-too-many-for-ti", lambda: sl.PatternTree(TI, TPL, levels=5), sl.ParameterError,
     r"'template' reaches .* fewer levels"),
    ("tree-memory-limit-too-small", lambda: sl.PatternTree(TI, TPL, memory_limit=10),
     sl.MemoryLimitError, r"memory_limit .* raise memory_limit"),
    ("tree-memory-limit-text", lambda: sl.PatternTree(TI, TPL, memory_limit="1GB"),
     sl.ParameterTypeError, r"'memory_limit' .* integer"),
    ("tree-min-replicates-text", lambda: sl.PatternTree(TI, TPL, min_replicates="2"),
     sl.ParameterTypeError, r"'min_replicates' .* integer"),
    ("tree-shape-4-numbers", lambda: _tree().simulate((2, 2, 2, 2)), sl.ParameterError,
     r"'shape' .* 2 or 3 positive integers"),
    ("tree-shape-float", lambda: _tree().simulate((2.0, 2)), sl.ParameterTypeError, r"'shape'"),
    ("tree-shape-scalar", lambda: _tree().simulate(5), sl.ParameterTypeError, r"'shape'"),
    ("tree-seed-text", lambda: _tree().simulate((4, 5), seed="1"), sl.ParameterTypeError,
     r"'seed' .* integer"),
    ("tree-seed-too-large", lambda: _tree().simulate((4, 5), seed=2**64), sl.ParameterError,
     r"'seed' .* \[0, 9223372036854775807\]"),
    ("tree-threads-too-many", lambda: _tree().simulate((4, 5), threads=10**6), sl.ParameterError,
     r"'threads' .* \[1, 1024\]"),
    ("tree-threads-text", lambda: _tree().simulate((4, 5), threads="2"), sl.ParameterTypeError,
     r"'threads'"),
    ("tree-steering-nan", lambda: _tree().simulate((4, 5), steering=float("nan")), sl.ParameterError,
     r"'steering' .* finite number in \[0, 1\]"),
    ("tree-target-nan", lambda: _tree().simulate((4, 5), target_proportions=[np.nan, 0.5, 0.5]),
     sl.ParameterError, r"'target_proportions' .* summing to 1"),
    ("tree-max-conditioning-text", lambda: _tree().simulate((4, 5), max_conditioning="3"),
     sl.ParameterTypeError, r"'max_conditioning'"),
    ("template-negative-radius", lambda: sl.Template.box(-1), sl.ParameterError, r"'radius'"),
    ("template-max-nodes-zero", lambda: sl.Template.ellipsoid(2, max_nodes=0), sl.ParameterError,
     r"'max_nodes' .* \[1, 20000\]"),
    ("template-too-large", lambda: sl.Template.box((0, 5000, 5000)), sl.ParameterError,
     r"'radius' gives 100020000 template nodes.*smaller radius"),
    ("template-float-offsets", lambda: sl.PatternTree(TI, np.array([[0, 0, np.nan]])),
     sl.ParameterTypeError, r"'offsets' .* integer array"),
    ("template-empty", lambda: sl.PatternTree(TI, np.zeros((0, 3), int)), sl.ParameterError,
     r"'offsets' .* n >= 1"),
    ("template-holds-centre", lambda: sl.PatternTree(TI, [[0, 0, 0]]), sl.ParameterError,
     r"'offsets' must not contain the centre"),
    ("direct-search-window-too-large",
     lambda: _direct(search_radius=(0, 500, 500)).simulate((4, 4)), sl.ParameterError,
     r"'search_radius' .* at most 20000 cells; use a smaller radius"),
    ("direct-neighbors-too-many", lambda: _direct(neighbors=10**9), sl.ParameterError,
     r"'neighbors' .* \[1, 10000\]"),
    ("direct-seed-negative", lambda: _direct().simulate((4, 4), seed=-3), sl.ParameterError,
     r"'seed' of DirectSampler.simulate"),
    ("grid-negative-spacing", lambda: sl.Grid((2, 2, 2), (1, -1, 1)), sl.ParameterError,
     r"'spacing' .* positive cell sizes; axis y"),
    ("grid-nan-origin", lambda: sl.Grid((2, 2, 2), (1, 1, 1), (0, np.nan, 0)), sl.ParameterError,
     r"'origin' .* finite"),
    ("grid-zero-extent", lambda: sl.Grid((2, 0, 2)), sl.ParameterError, r"'shape' of Grid"),
    ("seeds-negative-master", lambda: sl.realization_seeds(-1, 3), sl.ParameterError,
     r"'seed' of realization_seeds"),
    # --- files through the API
    ("study-path-not-a-path", lambda: sl.load_study(3), sl.StudyError,
     r"study path must be a path to a .toml file; got int"),
    ("study-path-is-a-folder", lambda: sl.load_study(Path(__file__).parent), sl.StudyError,
     r"study file .* cannot be read"),
    ("summary-missing", lambda: sl.open_summary("/nonexistent/run"), sl.ParameterError,
     r"'path' of open_summary .* run 'strataloom summarize DIR' first"),
]


@pytest.mark.parametrize(("call", "exc", "pattern"), [c[1:] for c in API_CASES],
                         ids=[c[0] for c in API_CASES])
def test_api_bad_input(call, exc, pattern):
    with pytest.raises(exc) as info:
        call()
    assert isinstance(info.value, ERRORS)
    message = str(info.value)
    assert len(message.strip().splitlines()) == 1, message
    assert re.search(pattern, message), message


def test_non_contiguous_arrays_give_the_result_of_their_copies():
    # a strided view is accepted and read as its values, not as its memory
    wide = np.tile([[0, 1, 2, 1]], (12, 6))
    view = wide[:, ::2]
    assert not view.flags.c_contiguous
    a = sl.PatternTree(view, TPL).simulate((6, 7), seed=4, threads=1)
    b = sl.PatternTree(np.ascontiguousarray(view), TPL).simulate((6, 7), seed=4, threads=1)
    np.testing.assert_array_equal(a, b)
    cview = np.asfortranarray(CONT)[:, ::2]
    c = sl.DirectSampler(cview, neighbors=4).simulate((5, 5), seed=2, threads=1)
    d = sl.DirectSampler(np.ascontiguousarray(cview), neighbors=4).simulate((5, 5), seed=2, threads=1)
    np.testing.assert_array_equal(c, d)


# --- study files and their data, through the CLI (`strataloom check`) ------------------------


def _edit(path: Path, old: str, new: str) -> None:
    text = path.read_text()
    assert old in text, old
    path.write_text(text.replace(old, new, 1))


def _soft(d: Path, p: Path, name: str, array: np.ndarray) -> None:
    _edit(p, "[engine]\n", f'[soft_data]\n{name} = {"[" if name == "attributes" else ""}'
          f'"x.npy"{"]" if name == "attributes" else ""}\n\n[engine]\n')
    np.save(d / "x.npy", array)


def _direct_study(p: Path, parameter: str) -> None:
    text = p.read_text()
    head, _, tail = text.partition("[engine]")
    _, _, rest = tail.partition("[ensemble]")
    p.write_text(f'{head}[engine]\nname = "direct_sampler"\n\n[engine.parameters]\n{parameter}\n\n[ensemble]{rest}')


def _csv(d: Path, text: str) -> None:
    (d / "wells" / "points.csv").write_text(text)


def _cli(capsys, argv: list[str]) -> str:
    try:
        code = main(argv)
    except SystemExit as e:  # argparse refusing an option
        code = e.code
    captured = capsys.readouterr()
    err = captured.err.strip()
    assert code == 2, (code, captured.out, err)
    assert len(err.splitlines()) == 1, err
    assert "Traceback" not in err
    assert re.match(r"strataloom( \w+)?: error: ", err), err
    return err


# (id, edit of the folder d and study file p, pattern, check with the timed probe)
STUDY_CASES = [
    ("realizations-zero", lambda d, p: _edit(p, "realizations = 4", "realizations = 0"),
     r"line \d+: 'ensemble.realizations' must be an integer in \[1, 100000\]; got 0"),
    ("realizations-text", lambda d, p: _edit(p, "realizations = 4", 'realizations = "4"'),
     r"'ensemble.realizations' must be an integer; got a string"),
    ("processes-negative", lambda d, p: _edit(p, "seed = 42", "seed = 42\nprocesses = -1"),
     r"'ensemble.processes' must be an integer in \[0, 1024\]"),
    ("grid-too-many-cells", lambda d, p: _edit(p, "shape = [4, 16, 16]", "shape = [2000, 2000, 2000]"),
     r"line \d+: 'grid.shape' has 8000000000 cells; at most 2147483647"),
    ("grid-spacing-negative", lambda d, p: _edit(p, "spacing = [1.0, 10.0,", "spacing = [1.0, -10.0,"),
     r"'grid.spacing\[1\]' must be a positive number"),
    ("grid-spacing-nan", lambda d, p: _edit(p, "spacing = [1.0, 10.0,", "spacing = [1.0, nan,"),
     r"'grid.spacing\[1\]' must be a positive number; got nan"),
    ("grid-origin-inf", lambda d, p: _edit(p, "origin = [0.0, 0.0,", "origin = [0.0, inf,"),
     r"'grid.origin\[1\]' must be a finite number"),
    ("toml-duplicate-key", lambda d, p: _edit(p, "seed = 42", "seed = 42\nseed = 43"),
     r"not valid TOML: .*line \d+"),
    ("category-name-repeated", lambda d, p: _edit(p, 'name = "sand"', 'name = "mud"'),
     r"line \d+: 'variables.facies.categories\[1\].name' repeats the category name 'mud'"),
    ("variable-kind-unknown", lambda d, p: _edit(p, 'kind = "categorical"', 'kind = "discrete"'),
     r"'variables.facies.kind' must be one of 'categorical', 'continuous'"),
    ("output-not-bool", lambda d, p: _edit(p, "summary = false", 'summary = "yes"'),
     r"'output.summary' must be true or false"),
    ("engine-variable-unknown",
     lambda d, p: _edit(p, 'name = "pattern_tree"', 'name = "pattern_tree"\nvariable = "poro"'),
     r"'engine.variable' must be one of 'facies'"),
    ("study-not-utf8", lambda d, p: p.write_bytes(b"\xff\xfe\x00 not text"), r"is not UTF-8 text"),
    ("study-empty", lambda d, p: p.write_text(""), r"needs the key 'grid'"),
    # security: only data files
    ("ti-pickle-file", lambda d, p: _edit(p, 'file = "ti.npy"', 'file = "ti.pkl"'),
     r"'training_image.file' must name a .npy file; got 'ti.pkl'"),
    ("ti-python-file", lambda d, p: _edit(p, 'file = "ti.npy"', 'file = "ti.py"'),
     r"'training_image.file' must name a .npy file"),
    ("ti-builder-python-file", lambda d, p: _edit(p, 'file = "ti.npy"', 'builder = "make_ti.py"'),
     r"'training_image.builder' must name a .toml file"),
    ("ti-absolute-path-missing",
     lambda d, p: _edit(p, 'file = "ti.npy"', 'file = "/nonexistent/folder/ti.npy"'),
     r"training image file '/nonexistent/folder/ti.npy' does not exist"),
    ("ti-relative-path-resolved", lambda d, p: _edit(p, 'file = "ti.npy"', 'file = "../elsewhere/ti.npy"'),
     r"training image file '/\S+/elsewhere/ti.npy' does not exist"),  # resolved, no '..' left
    ("ti-is-a-folder", lambda d, p: (_edit(p, 'file = "ti.npy"', 'file = "d.npy"'), (d / "d.npy").mkdir()),
     r"training image file '\S+d.npy' is not a readable .npy array"),
    ("ti-float-codes", lambda d, p: np.save(d / "ti.npy", np.random.default_rng(0).random((4, 8, 8))),
     r"training image 'ti.npy' must hold integer facies codes .* float64"),
    ("ti-1d", lambda d, p: np.save(d / "ti.npy", np.zeros(8, np.int16)),
     r"training image 'ti.npy' must be a 2-D or 3-D array; got shape \(8,\)"),
    ("ti-empty", lambda d, p: np.save(d / "ti.npy", np.zeros((0, 8), np.int16)),
     r"must be a 2-D or 3-D array; got shape \(0, 8\)"),
    # wells
    ("well-file-missing", lambda d, p: (d / "wells" / "points.csv").unlink(),
     r"well file '\S+points.csv' cannot be read: No such file"),
    ("well-coordinate-text", lambda d, p: _csv(d, "well,x,y,z,facies\nA,abc,5,1,0\n"),
     r"Column 'x' of '\S+points.csv' must hold numbers; row 2 holds 'abc'"),
    ("well-coordinate-nan", lambda d, p: _csv(d, "well,x,y,z,facies\nA,nan,5,1,0\n"),
     r"Column 'x' .* no value in row 2; every sample needs coordinates"),
    ("well-file-empty", lambda d, p: _csv(d, ""), r"well file 'points.csv' has no column for any"),
    ("well-code-unknown", lambda d, p: _csv(d, "well,x,y,z,facies\nA,5,5,1,7\n"),
     r"Well 'A' has code 7 for 'facies', which is not in the facies table \(codes \[0, 1\]\)"),
    ("well-code-fraction", lambda d, p: _csv(d, "well,x,y,z,facies\nA,5,5,1,0.5\n"),
     r"Well 'A' has a non-integer code .*0.5.* for categorical variable 'facies'"),
    ("well-outside-grid", lambda d, p: _csv(d, "well,x,y,z,facies\nA,-500,5,1,0\n"),
     r"Well 'A' \(points.csv\) lies entirely outside the grid: x -500..-500.*grid spans x 0..160"),
    ("las-binary", lambda d, p: (d / "wells" / "dev.las").write_bytes(bytes(range(256)) * 10),
     r"LAS file '\S+dev.las' cannot be read"),
    ("las-curve-missing", lambda d, p: _edit(p, 'facies = "FAC"', 'facies = "GR"'),
     r"has no curve 'GR' for variable 'facies'; it has DEPT, FAC"),
    ("survey-inclination-range",
     lambda d, p: (d / "wells" / "dev_survey.csv").write_text("md,inclination,azimuth\n0,0,90\n5,200,90\n"),
     r"survey file .* 'inclination' of Survey must be degrees in \[0, 180\]"),
    ("survey-md-unsorted",
     lambda d, p: (d / "wells" / "dev_survey.csv").write_text("md,inclination,azimuth\n5,0,90\n0,0,90\n"),
     r"'md' of Survey must be strictly increasing"),
    ("survey-columns-missing", lambda d, p: (d / "wells" / "dev_survey.csv").write_text("a,b\n1,2\n"),
     r"survey file .* needs a column 'md'; it has a, b"),
    ("collar-text", lambda d, p: _edit(p, "collar = [55.0, 45.0,", 'collar = ["a", 45.0,'),
     r"line \d+: 'wells\[1\].collar\[0\]' must be a number; got a string"),
    # soft data
    ("soft-probabilities-shape", lambda d, p: _soft(d, p, "probabilities", np.full((2, 4, 16, 15), 0.5)),
     r"soft data 'x.npy' has shape \(2, 4, 16, 15\); expected .* \(2, 4, 16, 16\)"),
    ("soft-probabilities-range", lambda d, p: _soft(d, p, "probabilities", np.full((2, 4, 16, 16), 1.5)),
     r"soft data 'x.npy' must hold probabilities in \[0, 1\] .* values in \[1.5, 1.5\]"),
    ("soft-probabilities-sum", lambda d, p: _soft(d, p, "probabilities", np.full((2, 4, 16, 16), 0.3)),
     r"soft data 'x.npy' must sum to 1 over the 2 categories .* Normalise"),
    ("soft-attribute-missing",
     lambda d, p: _edit(p, "[engine]\n", '[soft_data]\nattributes = ["none.npy"]\n\n[engine]\n'),
     r"attribute file '\S+none.npy' does not exist"),
    ("soft-attribute-all-nan", lambda d, p: _soft(d, p, "attributes", np.full((4, 16, 16), np.nan)),
     r"Attribute cube 1 holds no finite value"),
    ("soft-attribute-shape", lambda d, p: _soft(d, p, "attributes", np.zeros((4, 16, 15))),
     r"attribute 'x.npy' has shape \(4, 16, 15\); the grid is \(4, 16, 16\)"),
    ("soft-segy-missing",
     lambda d, p: _edit(p, "[engine]\n", '[soft_data]\nattributes = ["a.sgy"]\n\n[engine]\n'),
     r"attribute file '\S+a.sgy' does not exist"),
]

# engine parameters refused by the engine itself: reported against the study key and line
ENGINE_CASES = [
    ("engine-template-negative", lambda d, p: _edit(p, "radius = [1, 3, 3]", "radius = [1, -3, 3]"),
     r"line \d+: 'engine.parameters.template' is refused by the pattern_tree engine: .*'radius'"),
    ("engine-template-too-large",
     lambda d, p: _edit(p, "radius = [1, 3, 3], max_nodes = 20", "radius = [1, 300, 300]"),
     r"'engine.parameters.template' is refused .* template nodes"),
    ("engine-levels-too-many", lambda d, p: _edit(p, "levels = 2", "levels = 6"),
     r"'engine.parameters.template' is refused .* fewer levels"),
    ("engine-min-replicates-zero", lambda d, p: _edit(p, "min_replicates = 2", "min_replicates = 0"),
     r"line \d+: 'engine.parameters.min_replicates' is refused .* \[1, inf\]"),
    ("engine-memory-limit-too-small",
     lambda d, p: _edit(p, "min_replicates = 2", "min_replicates = 2\nmemory_limit = 100"),
     r"line \d+: 'engine.parameters.memory_limit' is refused .* raise memory_limit"),
    ("engine-direct-accept-distance", lambda d, p: _direct_study(p, "accept_distance = 2.0"),
     r"line \d+: 'engine.parameters.accept_distance' is refused by the direct_sampler engine: .*\[0, 1\]"),
    ("engine-direct-neighbors-zero", lambda d, p: _direct_study(p, "neighbors = 0"),
     r"line \d+: 'engine.parameters.neighbors' is refused by the direct_sampler engine"),
    ("engine-ti-smaller-than-template", lambda d, p: np.save(d / "ti.npy", np.array([[[0, 1]]], np.int16)),
     r"'engine.parameters.template' is refused .* larger training image"),
]


@pytest.mark.parametrize(("setup", "pattern"), [c[1:] for c in STUDY_CASES], ids=[c[0] for c in STUDY_CASES])
def test_study_bad_input(tmp_path, capsys, setup, pattern):
    p = write_small_study(tmp_path)
    setup(tmp_path, p)
    err = _cli(capsys, ["check", "--no-probe", str(p)])
    assert re.search(pattern, err), err


@pytest.mark.parametrize(("setup", "pattern"), [c[1:] for c in ENGINE_CASES],
                         ids=[c[0] for c in ENGINE_CASES])
def test_engine_refusals_name_the_study_key(tmp_path, capsys, setup, pattern):
    p = write_small_study(tmp_path)
    setup(tmp_path, p)
    assert re.search(pattern, _cli(capsys, ["check", str(p)]))
    # the run reports the same, from worker processes as from this one
    for processes in ("1", "2"):
        err = _cli(capsys, ["run", str(p), "--out", str(tmp_path / f"run{processes}"),
                            "--processes", processes, "--no-progress"])
        assert re.search(pattern, err), err


# memory estimates over the limit, with the machine's memory set small for the test:
# (id, bytes of memory the machine is said to have, command, pattern)
MEMORY_CASES = [
    ("memory-per-process-over-machine", 10_000, ["check", "--no-probe"],
     r"line \d+: 'grid.shape' needs about 3\d.\d KiB per process, more than the 9.8 KiB .* coarser grid"),
    ("memory-processes-over-machine", 40_000, ["run", "--processes", "2", "--no-progress", "--out", "RUN"],
     r"'ensemble.processes' asks for 2 processes .* use at most 1 processes \(--processes 1\)"),
]


@pytest.mark.parametrize(("memory", "argv", "pattern"), [c[1:] for c in MEMORY_CASES],
                         ids=[c[0] for c in MEMORY_CASES])
def test_memory_estimate_over_the_limit(tmp_path, capsys, monkeypatch, memory, argv, pattern):
    from strataloom import _validate

    monkeypatch.setattr(_validate, "physical_memory", lambda: memory)
    p = write_small_study(tmp_path)
    argv = [str(tmp_path / "run") if a == "RUN" else a for a in argv]
    err = _cli(capsys, [argv[0], str(p), *argv[1:]])
    assert re.search(pattern, err), err
    assert not (tmp_path / "run").exists()  # refused before anything was written


def test_conflicting_samples_in_one_cell_are_listed(tmp_path, capsys):
    # two wells disagree in one cell: not an error (common at coarse cells), but `check` lists
    # the cell, the rule that decided it (largest sample length, ties to the smaller code)
    p = write_small_study(tmp_path)
    _csv(tmp_path, "well,x,y,z,facies\nA,5,5,1,0\nB,6,6,1,1\n")
    assert main(["check", "--no-probe", str(p)]) == 0
    out = capsys.readouterr().out
    assert re.search(r"cell \(1, 0, 0\) facies: codes \[0, 1\] from A, B \(tie\); kept 0", out), out


# --- run folders, stores and CLI options -----------------------------------------------------


def _run_dir(tmp_path: Path, n: int = 3) -> Path:
    facies = np.random.default_rng(1).integers(0, 3, size=(n, 2, 5, 4)).astype(np.int16)
    return write_store(tmp_path / "run", {"facies": facies})


def _damage_chunk(run: Path, index: int) -> Path:
    chunk = run / "realizations.zarr" / "facies" / "c" / str(index) / "0" / "0" / "0"
    assert chunk.is_file(), sorted(p.relative_to(run) for p in run.rglob("*"))
    chunk.write_bytes(b"\x00garbage, not a compressed chunk" * 3)
    return chunk


def _setup_damaged(tmp_path):
    run = _run_dir(tmp_path)
    _damage_chunk(run, 1)
    return ["summarize", str(run)]


def _setup_not_zarr(tmp_path):
    run = tmp_path / "run"
    (run / "realizations.zarr").mkdir(parents=True)
    (run / "realizations.zarr" / "zarr.json").write_text("{ this is not json")
    return ["summarize", str(run)]


def _setup_newer(tmp_path):
    facies = np.zeros((2, 2, 3, 3), np.int16)
    run = write_store(tmp_path / "run", {"facies": facies}, extra={"format_version": 99})
    return ["report", str(run)]


def _setup_other_study(tmp_path):
    p = write_small_study(tmp_path / "s", n=2)
    run = tmp_path / "run"
    _run_dir(tmp_path)  # a store that this study did not write
    return ["run", str(p), "--out", str(run), "--processes", "1", "--no-progress"]


CLI_CASES = [
    ("store-chunk-damaged", _setup_damaged,
     r"Realization 1 of 'facies' .* cannot be read \(a damaged chunk.*the resume recomputes"),
    ("store-not-zarr", _setup_not_zarr, r"cannot be opened as a zarr v3 group"),
    ("store-newer-format", _setup_newer, r"format_version 99; this version reads up to 1. Upgrade"),
    ("store-of-another-study", _setup_other_study,
     r"already holds a store .* from a different study.*--overwrite"),
    ("memory-mb-negative", lambda t: ["summarize", str(_run_dir(t)), "--memory-mb", "-5"],
     r"--memory-mb: must be a positive number of MiB, such as 256; got '-5'"),
    ("memory-mb-text", lambda t: ["report", str(_run_dir(t)), "--memory-mb", "lots"],
     r"--memory-mb: must be a positive number of MiB"),
    ("processes-negative-option", lambda t: ["run", str(write_small_study(t)), "--out", str(t / "r"),
                                             "--processes", "-1"],
     r"--processes: must be a whole number in \[0, 1024\] \(0 = all cores\); got '-1'"),
    ("export-realization-out-of-range",
     lambda t: ["export", str(_run_dir(t)), "--format", "npy", "--realizations", "7"],
     r"realizations"),
    ("export-realizations-text",
     lambda t: ["export", str(_run_dir(t)), "--format", "npy", "--realizations", "first,second"],
     r"realizations"),
    ("report-ti-not-npy", lambda t: ["report", str(_run_dir(t)), "--ti", str(t / "ti.txt")],
     r"'--ti' must be an existing .npy file"),
    ("ti-stats-missing-file", lambda t: ["ti", "stats", str(t / "none.npy")],
     r"'TI' must be an existing .npy or .vti file \(check the path\). Got '\S+none.npy'"),
    ("ti-stats-not-an-array", lambda t: [(t / "ti.npy").write_text("text"), "ti", "stats", str(t / "ti.npy")][1:],
     r"'TI' must be a readable .npy array of category codes \(no pickles\)"),
    ("ti-build-missing-spec", lambda t: ["ti", "build", str(t / "none.toml"), "--out", str(t / "o")],
     r"none.toml: cannot read the spec"),
    ("check-folder-not-file", lambda t: ["check", str(t)], r"study file '\S+' cannot be read"),
]


@pytest.mark.parametrize("setup, pattern", [c[1:] for c in CLI_CASES], ids=[c[0] for c in CLI_CASES])
def test_cli_bad_input(tmp_path, capsys, setup, pattern):
    err = _cli(capsys, setup(tmp_path))
    assert re.search(pattern, err), err


def test_debug_shows_the_traceback(tmp_path, capsys):
    assert main(["--debug", "check", str(tmp_path / "none.toml")]) == 2
    assert "Traceback" in capsys.readouterr().err


def test_catalogue_is_documented_and_counted():
    ids = [c[0] for c in API_CASES + STUDY_CASES + ENGINE_CASES + MEMORY_CASES + CLI_CASES]
    assert len(ids) == len(set(ids)), "case ids repeat"
    doc = (Path(__file__).parents[1] / "docs" / "bad-inputs.md").read_text()
    missing = [i for i in ids if f"`{i}`" not in doc]
    assert not missing, f"docs/bad-inputs.md lacks {missing}"
    assert len(ids) >= 40
