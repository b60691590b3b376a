"""Shared test settings: hypothesis profile sized for a 2-core CI machine; a library key of the tests' own."""

import os
import tempfile
import warnings

from hypothesis import HealthCheck, settings

warnings.filterwarnings("ignore", message=".*Matplotlib.*")

settings.register_profile("ci", max_examples=200, deadline=None,
                          suppress_health_check=[HealthCheck.too_slow, HealthCheck.filter_too_much])
settings.register_profile("dev", max_examples=60, deadline=None,
                          suppress_health_check=[HealthCheck.too_slow, HealthCheck.filter_too_much])
settings.load_profile(os.environ.get("HYPOTHESIS_PROFILE", "ci"))

# The lab library signs its metadata with a key file (default: in the home folder of the account that
# runs the server). Tests, and every server they start, use a key of their own in a temporary folder.
if not os.environ.get("FRINGEGAUGE_LIBRARY_KEY_FILE"):
    os.environ["FRINGEGAUGE_LIBRARY_KEY_FILE"] = os.path.join(tempfile.mkdtemp(prefix="fringegauge-key-"),
                                                              "library.key")


# ---------------------------------------------------------------- parallel runs
# The suite runs on two processes (pytest-xdist, whole files per process: `-n 2 --dist loadfile`).
# Files that time a server under load (/health within a second, latency of twenty sessions, memory
# after a burst) are marked `exclusive`: each of their tests, fixtures included, runs while the other
# process runs nothing, so what they measure is the server, not the other half of the suite. A
# readers-writer lock on a file does it: every test holds it shared, an exclusive test holds it alone;
# a turnstile lock stops new shared holders while an exclusive test waits, so it is never starved.
import contextlib  # noqa: E402
import fcntl  # noqa: E402

import pytest  # noqa: E402

_LOCK_DIR = os.environ.get("FRINGEGAUGE_TEST_LOCK_DIR") or os.path.join(
    tempfile.gettempdir(), f"fringegauge-tests-{os.environ.get('PYTEST_XDIST_TESTRUNUID', 'solo')}")


@contextlib.contextmanager
def _suite_lock(exclusive: bool):
    os.makedirs(_LOCK_DIR, exist_ok=True)
    with open(os.path.join(_LOCK_DIR, "turnstile"), "a") as gate, open(os.path.join(_LOCK_DIR, "run"), "a") as run:
        fcntl.flock(gate, fcntl.LOCK_EX)
        if exclusive:
            fcntl.flock(run, fcntl.LOCK_EX)                 # waits for the running shared test to end
            fcntl.flock(gate, fcntl.LOCK_UN)
        else:
            fcntl.flock(gate, fcntl.LOCK_UN)
            fcntl.flock(run, fcntl.LOCK_SH)
        try:
            yield
        finally:
            fcntl.flock(run, fcntl.LOCK_UN)


def pytest_configure(config):
    config.addinivalue_line("markers", "exclusive: times a server; runs while no other test runs (parallel runs)")


def pytest_sessionstart(session):
    """Compile the photo map's loops once, before any test process or server worker needs them (a fresh clone
    has no numba cache: each process would otherwise compile them itself, seconds of CPU in the middle of
    tests that time the server)."""
    if os.environ.get("PYTEST_XDIST_WORKER"):
        return
    from physics.colourkernel import warm
    warm()


@pytest.hookimpl(hookwrapper=True)
def pytest_runtest_protocol(item, nextitem):
    if not os.environ.get("PYTEST_XDIST_WORKER"):
        yield
        return
    with _suite_lock(item.get_closest_marker("exclusive") is not None):
        yield
