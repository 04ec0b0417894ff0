"""Shared test settings: hypothesis profiles and a per-test time limit."""

import os
import signal
import threading

import pytest
from hypothesis import settings

# "ci" (the default) draws the same examples at every run, so a failure is reproducible and the
# suite never fails by chance; "dev" (HYPOTHESIS_PROFILE=dev) draws new ones at every run.
settings.register_profile("ci", max_examples=60, deadline=None, derandomize=True)
settings.register_profile("dev", max_examples=30, deadline=None)
settings.load_profile(os.environ.get("HYPOTHESIS_PROFILE", "ci"))

#: Seconds any one test may take before it fails as hung (override with STRATALOOM_TEST_TIMEOUT;
#: a test may ask for more with @pytest.mark.timeout(seconds)).
TEST_TIMEOUT = float(os.environ.get("STRATALOOM_TEST_TIMEOUT", "300"))


def pytest_configure(config):
    config.addinivalue_line("markers", "timeout(seconds): time limit of one test (default 300 s)")


class TestTimeout(Exception):
    """A test ran past its time limit."""


@pytest.fixture(autouse=True)
def _time_limit(request):
    """Fail a test that runs past its limit instead of hanging the suite. SIGALRM interrupts the
    main thread; the engines poll for signals every 100 ms while they run, so they stop too."""
    if not hasattr(signal, "setitimer") or threading.current_thread() is not threading.main_thread():
        yield
        return
    marker = request.node.get_closest_marker("timeout")
    limit = float(marker.args[0]) if marker else TEST_TIMEOUT

    def expire(signum, frame):
        raise TestTimeout(f"{request.node.nodeid} ran longer than {limit:g} s")

    previous = signal.signal(signal.SIGALRM, expire)
    signal.setitimer(signal.ITIMER_REAL, limit)
    try:
        yield
    finally:
        signal.setitimer(signal.ITIMER_REAL, 0)
        signal.signal(signal.SIGALRM, previous)
