"""Thread pool: progress reports, Ctrl-C, no threads left behind."""

import itertools
import os
import signal
import threading
import time

import pytest

from strataloom import _core


def _native_threads() -> int:
    return len(os.listdir("/proc/self/task"))


def test_progress_reaches_the_callback():
    seen = []
    used = _core.pool_selftest(0.35, 2, lambda done, total: seen.append((done, total)))
    assert used == 2
    assert len(seen) >= 2
    assert seen[-1] == (1000, 1000)
    assert all(a[0] <= b[0] for a, b in itertools.pairwise(seen))


def test_error_in_progress_callback_stops_the_run():
    def boom(done, total):
        raise RuntimeError("callback failed")

    t0 = time.monotonic()
    with pytest.raises(RuntimeError, match="callback failed"):
        _core.pool_selftest(20.0, 2, boom)
    assert time.monotonic() - t0 < 2.0


@pytest.mark.skipif(not hasattr(signal, "pthread_kill"), reason="needs POSIX signals")
def test_ctrl_c_stops_within_a_second_and_leaves_no_threads():
    before = _native_threads()
    main = threading.main_thread().ident
    timer = threading.Timer(0.3, lambda: signal.pthread_kill(main, signal.SIGINT))
    t0 = time.monotonic()
    timer.start()
    with pytest.raises(KeyboardInterrupt):
        _core.pool_selftest(30.0, 2, None)
    elapsed = time.monotonic() - t0
    timer.join()
    assert elapsed < 1.5
    assert _native_threads() <= before
