"""Bad input to the pattern tree: each gives one clear error naming the parameter."""

import os
import signal
import threading
import time

import numpy as np
import pytest

import strataloom as sl

TI = np.tile([[0, 1, 2, 1]], (12, 3))
TPL = sl.Template.box((0, 1, 1))


@pytest.mark.parametrize(
    ("make", "exc", "word"),
    [
        (lambda: sl.PatternTree(TI.astype(float), TPL), TypeError, "training_image"),
        (lambda: sl.PatternTree(TI + 300, TPL), ValueError, "training_image"),
        (lambda: sl.PatternTree(-np.ones((5, 5), int), TPL), ValueError, "masked"),
        (lambda: sl.PatternTree(np.zeros((0, 4), int), TPL), ValueError, "training_image"),
        (lambda: sl.PatternTree(np.zeros(7, int), TPL), ValueError, "training_image"),
        (lambda: sl.PatternTree(TI, sl.Template.box(1)), ValueError, "template"),
        (lambda: sl.PatternTree(TI, sl.Template.box((0, 3, 3)), levels=3), ValueError, "template"),
        (lambda: sl.PatternTree(TI, TPL, levels=0), ValueError, "levels"),
        (lambda: sl.PatternTree(TI, TPL, levels=2.0), TypeError, "levels"),
        (lambda: sl.PatternTree(TI, TPL, min_replicates=0), ValueError, "min_replicates"),
        (lambda: sl.PatternTree(TI, TPL, memory_limit=-5), ValueError, "memory_limit"),
        (lambda: sl.PatternTree(TI, [[0, 0.5, 1]]), TypeError, "offsets"),
    ],
)
def test_bad_construction(make, exc, word):
    with pytest.raises(exc, match=word):
        make()


@pytest.fixture(scope="module")
def tree():
    return sl.PatternTree(TI, TPL)


def _soft(values, shape=(3, 4, 5)):
    return np.broadcast_to(np.asarray(values, float)[:, None, None], shape).copy()


@pytest.mark.parametrize(
    ("kwargs", "exc", "word"),
    [
        ({"shape": (0, 5)}, ValueError, "shape"),
        ({"shape": (4, 5), "hard": np.full((5, 4), -1)}, ValueError, "hard"),
        ({"shape": (4, 5), "hard": np.full((4, 5), 0.5)}, TypeError, "hard"),
        ({"shape": (4, 5), "hard": np.full((4, 5), 7)}, ValueError, "hard"),
        ({"shape": (4, 5), "soft": _soft([0.5, 0.6, -0.1])}, ValueError, "soft"),
        ({"shape": (4, 5), "soft": _soft([0.5, 0.6, 0.2])}, ValueError, "summing to 1"),
        ({"shape": (4, 5), "soft": _soft([0.5, 0.5], (2, 4, 5))}, ValueError, "soft"),
        ({"shape": (4, 5), "soft": _soft([0.5, 0.5, 0.0]), "tau": [1, 1, 1]}, ValueError, "tau"),
        ({"shape": (4, 5), "soft": _soft([0.5, 0.5, 0.0]), "tau": -1.0}, ValueError, "tau"),
        ({"shape": (4, 5), "target_proportions": [0.5, 0.5]}, ValueError, "target_proportions"),
        ({"shape": (4, 5), "target_proportions": [0.5, 0.6, 0.1]}, ValueError, "target_proportions"),
        ({"shape": (4, 5), "steering": 1.5}, ValueError, "steering"),
        ({"shape": (4, 5), "seed": -1}, ValueError, "seed"),
        ({"shape": (4, 5), "threads": 0}, ValueError, "threads"),
        ({"shape": (4, 5), "max_conditioning": 0}, ValueError, "max_conditioning"),
        ({"shape": (4, 5), "progress": 3}, TypeError, "progress"),
    ],
)
def test_bad_simulation_arguments(tree, kwargs, exc, word):
    shape = kwargs.pop("shape")
    with pytest.raises(exc, match=word):
        tree.simulate(shape, **kwargs)


def test_hard_code_absent_from_the_ti():
    tree = sl.PatternTree(np.array([[0, 2, 0, 2, 0, 2]] * 4), TPL)
    hard = np.full((3, 3), -1)
    hard[1, 1] = 1
    with pytest.raises(ValueError, match=r"hard.*does not contain"):
        tree.simulate((3, 3), hard=hard)


def test_target_for_a_code_absent_from_the_ti():
    tree = sl.PatternTree(np.array([[0, 2, 0, 2, 0, 2]] * 4), TPL)
    with pytest.raises(ValueError, match="target_proportions"):
        tree.simulate((3, 3), target_proportions=[0.4, 0.2, 0.4])


def test_bad_conditional_queries(tree):
    with pytest.raises(ValueError, match="offsets"):
        tree.conditional([[0, 0, 5]], [1])
    with pytest.raises(ValueError, match="offsets"):
        tree.conditional([[0, 0, 1], [0, 0, 1]], [1, 1])
    with pytest.raises(ValueError, match="values"):
        tree.conditional([[0, 0, 1]], [9])
    with pytest.raises(ValueError, match="level"):
        tree.conditional([[0, 0, 1]], [1], level=3)


@pytest.mark.skipif(not hasattr(signal, "pthread_kill"), reason="needs POSIX signals")
def test_ctrl_c_stops_a_simulation():
    rng = np.random.default_rng(0)
    ti = rng.integers(0, 3, size=(30, 60, 60))
    big = sl.PatternTree(ti, sl.Template.ellipsoid((2, 3, 3), max_nodes=60), levels=1)
    main = threading.main_thread().ident
    timer = threading.Timer(0.5, lambda: signal.pthread_kill(main, signal.SIGINT))
    before = len(os.listdir("/proc/self/task"))
    t0 = time.monotonic()
    timer.start()
    with pytest.raises(KeyboardInterrupt):
        big.simulate((100, 100, 100), seed=0, threads=2)
    timer.join()
    assert time.monotonic() - t0 < 2.5
    assert len(os.listdir("/proc/self/task")) <= before
