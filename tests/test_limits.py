"""The server's named limits (views/limits.py) as the page meets them, without a browser."""

import contextlib
import json
import logging
import threading

import numpy as np
import pytest

from physics import InputError
from views import limits as L
from views.explorer import FilmExplorer
from views.fit import SpectrumFitSection
from views.grating import GratingSection
from views.state import MAP_ANGLE_POINTS, MAP_THICKNESS_POINTS, compute_map, map_grid_counts

#: Times the server: in a parallel run, each test runs while no other test does (tests/conftest.py).
pytestmark = pytest.mark.exclusive

WL = np.linspace(400.0, 1000.0, 250)


@contextlib.contextmanager
def _held(kind, session, limits):
    """A heavy job running in another thread for the duration of the block."""
    release, entered = threading.Event(), threading.Event()

    def hold():
        with L.heavy_job(kind, 1, session, limits):
            entered.set()
            release.wait(10)
    t = threading.Thread(target=hold)
    t.start()
    try:
        assert entered.wait(10)
        yield
    finally:
        release.set()
        t.join()


def _fit_section_with_spectrum(thickness_nm=650.0):
    """A spectrum → thickness section holding an invented noiseless spectrum of the default oxide."""
    section = SpectrumFitSection(FilmExplorer())
    R = section.ex.state.stack.with_thickness(0, thickness_nm).reflectance(WL)
    text = ("wavelength_nm,reflectance\n" + "\n".join(f"{a:.3f},{b:.6f}" for a, b in zip(WL, R))).encode()
    assert section.load_file("sample", text, "wafer.csv")
    return section


def test_one_heavy_job_per_page_by_default_and_others_still_run():
    limits = L.Limits(max_jobs_per_session=1, max_jobs_server=3)
    with _held("photo_map", "page-a", limits):
        with pytest.raises(InputError, match="still running a photo map"):
            with L.heavy_job("spectrum_fit", 1, "page-a", limits):
                pass
        with L.heavy_job("spectrum_fit", 1, "page-b", limits):        # another page is not held back
            assert sorted(L.running_jobs()["server"]) == ["photo_map", "spectrum_fit"]
    assert L.running_jobs() == {"server": [], "sessions": {}}


def test_server_limit_refuses_at_once_and_frees_its_place_after_errors():
    limits = L.Limits(max_jobs_per_session=2, max_jobs_server=1)
    with _held("photo_map", "page-a", limits):
        with pytest.raises(InputError, match="server is busy"):
            with L.heavy_job("spectrum_fit", 1, "page-b", limits):
                pass
    with pytest.raises(ValueError):
        with L.heavy_job("spectrum_fit", 1, "page-b", limits):
            raise ValueError("bad input inside the job")
    assert L.running_jobs() == {"server": [], "sessions": {}}


def test_each_heavy_job_logs_one_line_without_content(caplog):
    with caplog.at_level(logging.INFO, logger="fringegauge"):
        with L.heavy_job("spectrum_fit", 250, "page-a", L.Limits()):
            pass
    rec = [r for r in caplog.records if r.getMessage() == "heavy job"]
    assert len(rec) == 1
    r = rec[0]
    assert (r.session, r.kind, r.size, r.outcome) == ("page-a", "spectrum_fit", 250, "ok")
    assert r.duration_s >= 0
    json.dumps({k: getattr(r, k) for k in ("session", "kind", "size", "duration_s", "outcome")})


def test_fit_refused_by_its_own_page_while_a_photo_map_runs():
    section = _fit_section_with_spectrum(650.0)
    with _held("photo_map", L.session_key(section.ex), L.Limits.from_env()):
        section.run_fit(sync=True)
        assert section.result is None
        assert "still running a photo map" in section.fit_msg.message.object
    section.run_fit(sync=True)
    assert section.result is not None and abs(section.result.thickness_nm - 650) < 1


def test_fit_over_the_grid_limit_is_refused_with_what_to_change(monkeypatch):
    section = _fit_section_with_spectrum(650.0)
    monkeypatch.setenv("FRINGEGAUGE_MAX_GRID_POINTS", "10000")
    section.run_fit(sync=True)
    assert section.result is None
    shown = section.win_hi.message.object + section.fit_msg.message.object
    assert "grid points" in shown and "10,000" in shown and "Narrow" in shown


def test_film_map_is_coarsened_to_fit_the_grid_limit():
    s = FilmExplorer().state
    full = compute_map(s, L.Limits().max_grid_points)
    assert (full.thickness_nm.size, full.angle_deg.size) == (MAP_THICKNESS_POINTS, MAP_ANGLE_POINTS)
    n_wl = full.wavelength_nm.size
    limit = MAP_THICKNESS_POINTS * MAP_ANGLE_POINTS * n_wl // 4
    small = compute_map(s, limit)
    assert small.thickness_nm.size * small.angle_deg.size * n_wl <= limit
    assert small.thickness_nm.size == 200 and small.angle_deg.size == 45
    assert small.thickness_nm[-1] == full.thickness_nm[-1] and small.angle_deg[-1] == full.angle_deg[-1]
    with pytest.raises(InputError, match="grid points"):
        compute_map(s, 1000)
    assert map_grid_counts(400, 91, 81, 10**9) == (400, 91)


def test_film_map_limit_in_the_page_keeps_the_spectrum_working(monkeypatch):
    ex = FilmExplorer()
    monkeypatch.setenv("FRINGEGAUGE_MAX_GRID_POINTS", "1000")
    ex.state.thickness_max_nm = 900.0
    ex.refresh({"map", "point"}, sync=True)
    assert ex.error.visible and "grid points" in ex.error.object


def test_grating_map_over_the_grid_limit_says_so(monkeypatch):
    monkeypatch.setenv("FRINGEGAUGE_MAX_GRID_POINTS", "1000")
    g = GratingSection()
    assert "grid points" in g.map_status.object


def test_interactive_threads_are_sized_from_settings(monkeypatch):
    monkeypatch.setenv(L.THREADS_ENV, "3")
    assert L.interactive_executor()._max_workers == 3
    monkeypatch.delenv(L.THREADS_ENV)
    assert L.interactive_executor()._max_workers == L.DEFAULT_THREADS


def test_post_to_page_after_the_page_has_gone():
    class Gone:
        session_context = None
    assert not L.post_to_page(Gone(), lambda: None)
    assert not L.post_to_page(None, lambda: None)


def test_cancelled_photo_map_stops_at_its_next_stage_and_frees_its_place(monkeypatch, caplog):
    import views.inverse as inv
    from tests.test_views_inverse import _wedge_png

    section = inv.ColourToThickness(FilmExplorer())
    data, _ = _wedge_png()
    assert section.load_photo(data, "wedge.png")
    real = inv.thickness_map

    def cancelled_midway(progress=None, **kw):
        progress(0.1, "starting")
        section.cancel()                           # the user presses "Cancel the map"
        progress(0.5, "matching")                  # the next stage notices
        return real(progress=progress, **kw)
    monkeypatch.setattr(inv, "thickness_map", cancelled_midway)
    with caplog.at_level(logging.INFO, logger="fringegauge"):
        section.start_map(sync=True)
    assert section.result is None and not section.cancel_map.visible and not section.run_map.disabled
    assert L.running_jobs() == {"server": [], "sessions": {}}
    assert [r.outcome for r in caplog.records if r.getMessage() == "heavy job"] == ["cancelled"]
    monkeypatch.setattr(inv, "thickness_map", real)
    section.start_map(sync=True)
    assert section.result is not None


def test_websocket_cap_holds_one_upload_chunk_with_room_around_it():
    assert L.UPLOAD_CHUNK_BYTES + 2**20 <= L.WEBSOCKET_MESSAGE_CAP_BYTES <= 4 * 2**20


def test_a_cancelled_job_stops_in_its_worker_process():
    import asyncio
    from tests.test_views_inverse import _wedge_png
    from physics.imageio import load_image
    from views import workers

    ex = FilmExplorer()
    data, _ = _wedge_png()
    args = dict(image=load_image(data), stack=ex.state.stack, layer=0, thickness_nm=(0.0, 1000.0))
    seen = []

    async def run(cancel):
        channel = await workers.new_channel()
        return await workers.run_in_worker(1, workers.photo_map, args, channel=channel,
                                           on_progress=lambda f, t: seen.append(f), cancelled=lambda: cancel)
    try:
        result, error = asyncio.run(run(False))             # runs to the end in a worker process
        assert error is None and result.stats["pixels"] > 0
        with pytest.raises(L.JobCancelled):
            asyncio.run(run(True))                          # told at once: stops at its first stage
    finally:
        workers.shutdown()


def test_a_page_closed_mid_write_is_one_info_line_and_other_errors_still_reach_the_handler(caplog):
    import asyncio
    from tornado.iostream import StreamClosedError
    from tornado.websocket import WebSocketClosedError

    loop = asyncio.new_event_loop()
    seen = []
    loop.set_exception_handler(lambda lp, ctx: seen.append(ctx["exception"]))
    try:
        L.quiet_closed_connections(loop)
        L.quiet_closed_connections(loop)                     # twice: still one handler
        with caplog.at_level(logging.INFO, logger="fringegauge"):
            for exc in (WebSocketClosedError(), StreamClosedError()):
                loop.call_exception_handler({"message": "Task exception was never retrieved", "exception": exc})
        other = RuntimeError("a real problem")
        loop.call_exception_handler({"message": "boom", "exception": other})
    finally:
        loop.close()
    assert seen == [other]
    assert [r.getMessage() for r in caplog.records].count("a page closed while the server was writing to it") == 2


def test_pages_closing_in_a_burst_hand_memory_back_once(monkeypatch, caplog):
    import platform
    import time as _time

    if platform.libc_ver()[0] != "glibc":
        pytest.skip("malloc_trim is glibc's")
    monkeypatch.setattr(L, "GIVE_BACK_DELAY_S", 0.2)
    with caplog.at_level("INFO", logger="fringegauge"):
        for _ in range(5):                                  # five pages destroyed in one sweep
            L.page_closed(session_context=None)
        _time.sleep(1.0)
    lines = [r for r in caplog.records if r.getMessage() == "memory handed back"]
    assert len(lines) == 1 and lines[0].gc_s >= 0 and lines[0].trim_s >= 0
