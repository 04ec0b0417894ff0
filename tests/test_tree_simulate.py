"""Pattern-tree simulation: structure reproduction, conditioning, soft data, proportions, threads."""

import numpy as np
import pytest
from scipy import ndimage

import strataloom as sl


def blob_ti(shape=(1, 80, 80), sand=0.3, seed=0, sigma=3.0):
    """Two-facies image from thresholded smoothed noise (test input, not a checked result)."""
    rng = np.random.default_rng(seed)
    field = ndimage.gaussian_filter(rng.standard_normal(shape), sigma=(0 if shape[0] == 1 else sigma, sigma, sigma))
    return (field > np.quantile(field, 1 - sand)).astype(np.int8)


def test_two_two_cell_patterns_half_each():
    # Common practice, no source: a TI holding exactly two 2-cell patterns, (0, 1) and (1, 0);
    # a 2-cell grid simulated 400 times shows each about half the time (binomial, 3 sigma) and
    # never a third pattern.
    ti = np.tile([0, 1], 20)[None, :]
    tree = sl.PatternTree(ti, sl.Template([[0, 0, 1], [0, 0, -1]]))
    sims = np.array([tree.simulate((1, 2), seed=s) for s in range(400)])[:, 0, :]
    first = (sims == [0, 1]).all(axis=1).sum()
    second = (sims == [1, 0]).all(axis=1).sum()
    assert first + second == 400
    assert abs(first - 200) <= 3 * np.sqrt(400 * 0.25)


def _checkerboard(n):
    return np.add.outer(np.arange(n), np.arange(n)) % 2


def test_checkerboard_is_reproduced_with_enough_levels():
    # Common practice, no source: once the coarsest template spans the grid, the TI's only
    # patterns (a perfect checkerboard) are all the realization can hold.
    tree = sl.PatternTree(_checkerboard(40), sl.Template.box((0, 1, 1)), levels=6)
    for seed in range(5):
        r = tree.simulate((32, 32), seed=seed)
        assert np.array_equal(r, _checkerboard(32)) or np.array_equal(r, 1 - _checkerboard(32))


def test_one_level_small_template_breaks_the_checkerboard():
    # Measured here: with one level and a 3 x 3 template, early isolated nodes are drawn
    # independently and conflict, which is what multiple grids are for.
    tree = sl.PatternTree(_checkerboard(40), sl.Template.box((0, 1, 1)), levels=1)
    perfect = 0
    for seed in range(5):
        r = tree.simulate((32, 32), seed=seed)
        perfect += np.array_equal(r, _checkerboard(32)) or np.array_equal(r, 1 - _checkerboard(32))
    assert perfect < 5


def test_stripes_stay_unbroken():
    # Common practice, no source: a TI of straight stripes (codes 0, 1, 2 repeating row after row)
    # gives rows of one code, cycling in the TI's order, once the coarsest template spans the grid.
    # Every node then sees an informed row above or below at each level, which fixes its code.
    ti = np.repeat(np.arange(48) % 3, 48).reshape(48, 48)
    tree = sl.PatternTree(ti, sl.Template.box((0, 1, 1)), levels=6)
    for seed in range(3):
        r = tree.simulate((32, 32), seed=seed)
        assert (r == r[:, :1]).all(), "a stripe is broken"
        assert set(((r[1:, 0] - r[:-1, 0]) % 3).tolist()) == {1}


def test_tau_model_worked_values():
    # Journel 2002 (Mathematical Geology 34(5)) formula with tau = 1: prior 0.5, TI 0.5, soft 0.8
    # gives 0.8; a TI probability of 1 stays 1 whatever the soft data say.
    np.testing.assert_allclose(sl.tau_merge([0.5, 0.5], [[0.5, 0.5], [0.8, 0.2]]), [0.8, 0.2])
    np.testing.assert_allclose(sl.tau_merge([0.5, 0.5], [[1.0, 0.0], [0.3, 0.7]]), [1.0, 0.0])
    # permanence of ratios with two informative sources: x/x0 = (x1/x0)(x2/x0)
    p = sl.tau_merge([0.25, 0.75], [[0.5, 0.5], [0.5, 0.5]])
    x0, x1 = 0.75 / 0.25, 1.0
    np.testing.assert_allclose(p[0], 1 / (1 + x1 * x1 / x0), rtol=1e-12)


def test_soft_data_pull_the_simulation_as_the_tau_model_says():
    # A TI with no spatial structure (independent 50/50 cells): the TI probability equals the prior,
    # so by the tau model (Journel 2002) the simulated share of code 1 equals the soft probability.
    ti = np.random.default_rng(5).integers(0, 2, size=(1, 120, 120))
    tree = sl.PatternTree(ti, sl.Template([[0, 0, 1]]), min_replicates=1)
    soft = np.empty((2, 1, 60, 60))
    soft[1] = 0.8
    soft[0] = 0.2
    shares = [tree.simulate((1, 60, 60), soft=soft, seed=s).mean() for s in range(3)]
    assert abs(np.mean(shares) - 0.8) < 0.03


def test_soft_data_raise_the_local_share():
    # Tau model (Journel 2002): a soft probability of 0.9 for code 1 over a block raises the
    # block's share of code 1 far above the TI proportion, while cells without soft data stay near it.
    ti = blob_ti((1, 150, 150), sigma=2.0)
    tree = sl.PatternTree(ti, sl.Template.box((0, 2, 2)), levels=2)
    soft = np.full((2, 48, 48), np.nan)
    soft[0, 8:40, 8:40] = 0.1
    soft[1, 8:40, 8:40] = 0.9
    inside = np.mean([tree.simulate((48, 48), soft=soft, seed=s)[8:40, 8:40].mean() for s in range(4)])
    assert inside > 0.7 > ti.mean() + 0.3


@pytest.mark.parametrize("shape", [(1, 48, 48), (6, 20, 20)])
def test_hard_data_honoured_every_time(shape):
    three_d = shape[0] > 1
    ti = blob_ti((10, 40, 40) if three_d else (1, 80, 80))
    tpl = sl.Template.ellipsoid((1.5 if three_d else 0, 3, 3), max_nodes=24)
    tree = sl.PatternTree(ti, tpl, levels=2)
    rng = np.random.default_rng(0)
    hard = np.full(shape, -1, dtype=np.int16)
    picks = rng.random(shape) < 0.03
    hard[picks] = rng.integers(0, 2, picks.sum())
    for seed in range(20):
        r = tree.simulate(shape, hard=hard, seed=seed)
        np.testing.assert_array_equal(r[picks], hard[picks])


def test_identical_for_any_thread_count():
    ti = blob_ti((8, 40, 40))
    tree = sl.PatternTree(ti, sl.Template.ellipsoid((1, 3, 3), max_nodes=30), levels=3)
    hard = np.full((8, 32, 32), -1)
    hard[:, 16, 16] = 1
    runs, stats = [], []
    for t in (1, 2, 4):
        fresh = sl.PatternTree(ti, sl.Template.ellipsoid((1, 3, 3), max_nodes=30), levels=3)
        runs.append(fresh.simulate((8, 32, 32), hard=hard, seed=11, threads=t))
        stats.append({k: v for k, v in fresh.last_stats.items() if k != "seconds"})
        # A second realization on the same tree finds the answers the first one kept.
        np.testing.assert_array_equal(runs[-1], fresh.simulate((8, 32, 32), hard=hard, seed=11, threads=t))
        assert {k: v for k, v in fresh.last_stats.items() if k != "seconds"} == stats[-1]
    np.testing.assert_array_equal(runs[0], runs[1])
    np.testing.assert_array_equal(runs[0], runs[2])
    # The engine's counters too: the answers the threads remember are the same whoever fills them.
    assert stats[0] == stats[1] == stats[2]
    assert sum(stats[0]["remembered"]) > 0
    assert not np.array_equal(runs[0], tree.simulate((8, 32, 32), hard=hard, seed=12, threads=2))


def test_mean_proportions_follow_the_ti():
    # Common practice, no source: without steering, the ensemble's mean proportions stay near the
    # training image's (within 0.03 over 20 realizations).
    ti = blob_ti((1, 150, 150), sand=0.3, sigma=2.0)
    tree = sl.PatternTree(ti, sl.Template.ellipsoid((0, 4, 4), max_nodes=30), levels=3)
    shares = [tree.simulate((64, 64), seed=s).mean() for s in range(20)]
    assert abs(np.mean(shares) - ti.mean()) < 0.03


def test_full_steering_reaches_the_target():
    ti = blob_ti((1, 150, 150), sand=0.3, sigma=2.0)
    tree = sl.PatternTree(ti, sl.Template.ellipsoid((0, 4, 4), max_nodes=30), levels=3)
    shares = [tree.simulate((64, 64), seed=s, target_proportions=[0.55, 0.45], steering=1.0).mean()
              for s in range(20)]
    assert abs(np.mean(shares) - 0.45) < 0.02
    # without steering the same target only sets the prior; proportions stay near the TI's
    loose = [tree.simulate((64, 64), seed=s, target_proportions=[0.55, 0.45], steering=0.0).mean()
             for s in range(5)]
    assert abs(np.mean(loose) - ti.mean()) < 0.05


def test_simulated_bodies_resemble_the_ti():
    # Indicator variogram at short lags within a band of the TI's (common practice, no source).
    ti = blob_ti((1, 150, 150), sand=0.3, sigma=2.0)
    tree = sl.PatternTree(ti, sl.Template.ellipsoid((0, 4, 4), max_nodes=30), levels=3)

    def gamma(a, lag):
        return 0.5 * np.mean(a[:, lag:] != a[:, :-lag])

    for lag in (1, 3):
        ti_g = gamma(ti[0], lag)
        sims = [gamma(tree.simulate((64, 64), seed=s), lag) for s in range(5)]
        assert abs(np.mean(sims) - ti_g) < 0.35 * ti_g
    # random noise with the same proportion has a far larger short-lag variogram
    noise = (np.random.default_rng(0).random((64, 64)) < ti.mean()).astype(int)
    assert gamma(noise, 1) > 2 * gamma(ti[0], 1)


def test_progress_callback_and_stats():
    tree = sl.PatternTree(blob_ti(), sl.Template.box((0, 1, 1)), levels=2)
    calls = []
    tree.simulate((40, 40), seed=0, progress=lambda d, t: calls.append((d, t)))
    assert calls and calls[-1] == (1600, 1600)
    assert sum(tree.last_stats["simulated"]) == 1600


def test_three_level_3d_realizations_keep_the_ti_variogram():
    # Common practice, no source: realizations reproduce the training image's indicator
    # variogram at short lags along every axis. Three levels exercise the staged refinement of the
    # finer levels (each parity class of cells on its own path, queried with its ordered tree).
    from strataloom.variogram import axis_semivariograms

    rng = np.random.default_rng(5)
    field = ndimage.gaussian_filter(rng.standard_normal((32, 80, 80)), sigma=(1.5, 4, 4))
    ti = (field > np.quantile(field, 0.7)).astype(np.int8)
    tree = sl.PatternTree(ti, sl.Template.ellipsoid((2, 5, 5), max_nodes=40), levels=3)
    sims = [tree.simulate(ti.shape, seed=s) for s in range(3)]
    valid = np.ones(ti.shape, bool)
    lags = [0, 1, 3]  # lags 1, 2 and 4 cells

    def gammas(fields):
        return np.array([axis_semivariograms([f.astype(float) for f in fields], valid, axis, 4,
                                             indicator=True).mean(axis=0)[lags] for axis in range(3)])

    want, got = gammas([ti]), gammas(sims)
    assert np.all(np.abs(got / want - 1) < 0.25), (want, got)
    # uncorrelated noise of the same proportion is far off: the check can fail
    noise = (rng.random(ti.shape) < ti.mean()).astype(np.int8)
    assert np.all(gammas([noise])[:, 0] > 2 * want[:, 0])


def test_results_do_not_depend_on_which_ordered_trees_fit_in_memory():
    # Staged levels query ordered trees when they fit in memory_limit and scan the bit planes
    # otherwise; both count the same events, so a realization must not depend on the limit (or on
    # the machine whose memory sets the default).
    ti = blob_ti((1, 80, 80), sand=0.3, sigma=2.0)
    tpl = sl.Template.ellipsoid((0, 3, 3), max_nodes=24)
    roomy = sl.PatternTree(ti, tpl, levels=3, min_replicates=3)
    want = roomy.simulate((60, 60), seed=5, threads=1)
    assert roomy.memory_bytes > sl.PatternTree(ti, tpl, levels=3).memory_bytes  # ordered trees were built
    tight = sl.PatternTree(ti, tpl, levels=3, min_replicates=3, memory_limit=roomy.memory_bytes // 2)
    for threads in (1, 2):
        np.testing.assert_array_equal(tight.simulate((60, 60), seed=5, threads=threads), want)
    assert tight.memory_bytes < roomy.memory_bytes  # some ordered trees did not fit


def test_results_do_not_depend_on_the_processor_kernels(tmp_path):
    # The bit-plane kernels are chosen once per process (AVX-512 where the processor has it, plain
    # loops otherwise; STRATALOOM_KERNELS=portable forces the plain ones): realizations, the
    # engine's counters and conditional counts must be the same either way, for one and several
    # levels. (`mean_visited` measures the work each kernel set did, so it may differ.)
    import os
    import subprocess
    import sys

    script = tmp_path / "run.py"
    script.write_text(
        "import sys, numpy as np, strataloom as sl\n"
        "rng = np.random.default_rng(3)\n"
        "ti = (rng.random((1, 70, 70)) < 0.35).astype(np.int8)\n"
        "ti[0, 20:40, :] = 2\n"
        "tpl = sl.Template.ellipsoid((0, 3, 3), max_nodes=24)\n"
        "out = {}\n"
        "for levels in (1, 3):\n"
        "    for mr in (1, 3):\n"
        "        t = sl.PatternTree(ti, tpl, levels=levels, min_replicates=mr)\n"
        "        out[f'{levels}-{mr}'] = t.simulate((50, 60), seed=levels + mr, threads=2)\n"
        "        for name in ('mean_informed', 'mean_kept', 'scans', 'remembered'):\n"
        "            out[f'{levels}-{mr}-{name}'] = np.asarray(t.last_stats[name])\n"
        "        picks = np.random.default_rng(levels + mr)\n"
        "        for q in range(40):\n"
        "            chosen = picks.choice(len(tpl), size=int(picks.integers(0, 12)), replace=False)\n"
        "            values = picks.integers(0, 3, size=len(chosen))\n"
        "            probs, rep, kept = t.conditional(tpl.offsets[chosen], values)\n"
        "            out[f'{levels}-{mr}-q{q}'] = np.concatenate([probs, [rep, kept]])\n"
        "np.savez(sys.argv[1], **out)\n")
    runs = []
    for kernels in ("", "portable"):
        target = tmp_path / f"out-{kernels or 'best'}.npz"
        env = dict(os.environ, STRATALOOM_KERNELS=kernels)
        subprocess.run([sys.executable, str(script), str(target)], check=True, env=env)
        runs.append(np.load(target))
    for key in runs[0].files:
        np.testing.assert_array_equal(runs[0][key], runs[1][key], err_msg=key)
