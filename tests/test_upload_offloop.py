"""Uploads never freeze the server: a hostile file dropped on the page leaves /health answering.

serve.py runs on a free loopback port; a simulated browser tab (tests/support/loadclient.PageSession)
drops files on the page's drop zones in chunks, as the browser does, while a separate process asks
GET /health every 0.1 s. Each file is one a person could send within its drop zone's size cap: a
spectrum of five million short lines, the densest spectrum the page reads, a spectrum that is one
20 MB line, a lamp spectrum of half a million lines, a stack file of long material tables and a
24-megapixel photo. For each, every /health answer from the first chunk sent until the page answers
comes within 1 s (a protection property, not a benchmark), the page says "Reading <name> …" and then
that the file was refused or read, and afterwards the server serves a fresh session.
"""

from __future__ import annotations

import asyncio
import html
import io
import json
import subprocess
import sys
import time

import numpy as np
import pytest

from tests.support.loadclient import CROWD_SERVER_ARGS, PageError, PageSession
from tests.support.server import served_lab
from tests.test_faults import _assert_serving

#: Times the server: in a parallel run, each test runs while no other test does (tests/conftest.py).
pytestmark = pytest.mark.exclusive

#: Every /health answer during an upload must come within this many seconds.
HEALTH_MAX_S = 1.0
#: Pause between two /health requests (s).
HEALTH_EVERY_S = 0.1
#: Longest wait for the page to say what became of one file (s): sending 50 MB over loopback in
#: chunks and reading it take a few seconds; a parse without a bound took half a minute.
OUTCOME_TIMEOUT_S = 90.0
#: Pause between opening a tab and dropping the file (s): a person picks the file meanwhile, and the
#: server has finished building the tab.
PICK_FILE_S = 1.0
#: The measured spectrum drop zone's cap (views.fit.MAX_UPLOAD_BYTES).
SPECTRUM_CAP_BYTES = 20_000_000
#: Tabs of the page, in order (app.py).
TAB_EXPLORER, TAB_COLOUR, TAB_SPECTRUM = 0, 1, 2


#: The poller, run in its own process so the test client's work never delays its requests: GET the URL every
#: interval until stdin closes, then print one line per request: sent at (time.monotonic, shared by every
#: process of the machine), seconds to answer, 1 if answered "ok".
POLLER = """
import sys, threading, time, urllib.request
url, every = sys.argv[1], float(sys.argv[2])
done = threading.Event()
threading.Thread(target=lambda: (sys.stdin.read(), done.set()), daemon=True).start()
rows = []
while not done.is_set():
    t0 = time.monotonic()
    try:
        with urllib.request.urlopen(url, timeout=30) as resp:
            ok = resp.status == 200 and b'"ok"' in resp.read()
    except Exception:
        ok = False
    rows.append(f"{t0!r} {time.monotonic() - t0!r} {int(ok)}")
    done.wait(every)
print("\\n".join(rows), flush=True)
"""


class HealthPoller:
    """GET /health every HEALTH_EVERY_S from a separate process while the block runs; then ``samples`` holds
    (sent at, seconds to answer, answered ok) per request, times from ``time.monotonic``."""

    def __init__(self, base: str):
        self.url = base + "/health"
        self.samples: list[tuple[float, float, bool]] = []
        self._proc = None

    def __enter__(self):
        self._proc = subprocess.Popen([sys.executable, "-c", POLLER, self.url, str(HEALTH_EVERY_S)],
                                      stdin=subprocess.PIPE, stdout=subprocess.PIPE, text=True)
        return self

    def __exit__(self, *exc):
        out, _ = self._proc.communicate(input="", timeout=90)
        for line in out.splitlines():
            sent, dt, ok = line.split()
            self.samples.append((float(sent), float(dt), ok == "1"))

    def worst(self, t0: float, t1: float) -> float:
        """The slowest answer to a request that was waiting at some moment from t0 to t1 (0 if none).

        Only the upload is judged: opening a page (Bokeh builds its document on the event loop) holds
        /health up by itself, before any file is sent."""
        return max((dt for sent, dt, _ in self.samples if sent <= t1 and sent + dt >= t0), default=0.0)


def _many_lines_spectrum() -> bytes:
    """Five million lines of "4,1" (the wavelength and value do not matter): just inside the 20 MB cap."""
    header = b"wavelength,reflectance\n"
    n = (SPECTRUM_CAP_BYTES - len(header)) // 4
    assert n >= 4_990_000
    return header + b"4,1\n" * n


def _densest_spectrum() -> bytes:
    """As many lines as a spectrum may have and still be read: an invented reflectance, 380-1000 nm."""
    from physics.fit import MAX_SPECTRUM_LINES

    wl = np.linspace(380.0, 1000.0, MAX_SPECTRUM_LINES - 1)
    r = 0.3 + 0.1 * np.sin(wl / 15.0)
    return ("nm,R\n" + "\n".join(f"{w:.4f},{v:.4f}" for w, v in zip(wl, r))).encode()


def _one_line_spectrum() -> bytes:
    """One line of 20 MB: number pairs separated by semicolons and never a line break."""
    unit = b"400.5;0.25;"
    return unit * (SPECTRUM_CAP_BYTES // len(unit))


def _many_lines_lamp() -> bytes:
    """Half a million short lines, within the lamp drop zone's 2 MB cap."""
    return b"500,1\n" * 330_000


def _table_stack() -> bytes:
    """An invented stack file near 0.7 MB: five layers, each a material table of 10,000 rows (the most a
    stack file may hold per list)."""
    rows = 10_000
    layers = [{"material": {"kind": "table", "name": f"invented film {k}",
                            "wavelength_nm": [round(300 + 0.07 * i, 2) for i in range(rows)],
                            "n": [round(1.45 + 0.0001 * (i % 500), 4) for i in range(rows)]},
               "thickness_nm": 100.0 + 50 * k} for k in range(5)]
    return json.dumps({"format": "fringegauge-stack", "version": 1, "name": "Invented table stack", "ambient": "air",
                       "layers": layers, "substrate": "Si"}, separators=(",", ":")).encode()


def _photo_png(width=6000, height=4000) -> bytes:
    """An invented 24-megapixel photo (coloured bands and noise, not a measurement) as an 8-bit RGB PNG."""
    from PIL import Image

    rng = np.random.default_rng(3)
    x = np.arange(width, dtype=np.uint16)[None, :]
    y = np.arange(height, dtype=np.uint16)[:, None]
    rgb = np.empty((height, width, 3), np.uint8)
    rgb[..., 0] = (x // 24) % 200
    rgb[..., 1] = (y // 16) % 200
    rgb[..., 2] = ((x + y) // 40) % 200
    rgb += rng.integers(0, 40, rgb.shape, dtype=np.uint8)
    buf = io.BytesIO()
    Image.fromarray(rgb).save(buf, format="PNG", compress_level=1)
    return buf.getvalue()


@pytest.fixture(scope="module")
def lab(tmp_path_factory):
    with served_lab(tmp_path_factory.mktemp("offloop"), *CROWD_SERVER_ARGS) as (base, proc, log_path):
        yield {"base": base, "port": int(base.rsplit(":", 1)[1]), "proc": proc, "log": log_path}


def _texts(session: PageSession) -> list[str]:
    return [session.text(mid) for mid, m in session.models.items()
            if m["name"].endswith(("Markdown", "HTML", "Title")) and m["attributes"].get("text")]


async def _drop(base: str, tab: int, css: str, name: str, data: bytes, mime: str, outcome):
    """Open a page, open ``tab``, drop ``data`` on the drop zone with css class ``css``; wait until some text
    of the page satisfies ``outcome``. Returns ((time.monotonic of the first chunk sent, of the outcome seen),
    the text that said it, every text the page showed meanwhile)."""
    s = await PageSession(base).open()
    try:
        if tab:
            await s.set_value(s.find("Tabs"), "active", tab)

        def arrived():
            try:
                s.find("FileDropper", css)
            except PageError:
                return False
            return True
        await s.wait_until(arrived, 30)
        zone = s.find("FileDropper", css)
        s.watched |= {mid for mid, m in s.models.items() if m["name"].endswith("HTML")}
        await asyncio.sleep(PICK_FILE_S)

        def said():
            return next((t for t in _texts(s) if outcome(t)), None)
        t0, since = time.monotonic(), time.perf_counter()
        await s.upload(zone, name, data, mime)
        await s.wait_until(lambda: said() is not None, OUTCOME_TIMEOUT_S)
        t1 = time.monotonic()
        shown = [html.unescape(str(new)) for t, _, attr, new in s.history if t >= since and attr == "text"]
        return (t0, t1), said(), shown
    finally:
        await s.close()


CASES = {
    # name: (tab, drop zone css, file name, content, mime, what the page says when done)
    "five million lines": (TAB_SPECTRUM, "fg-fit-sample-file", "many_lines.csv", _many_lines_spectrum, "text/csv",
                           lambda t: "many_lines.csv:" in t or "Sample many_lines.csv" in t),
    "the densest spectrum read": (TAB_SPECTRUM, "fg-fit-sample-file", "dense.csv", _densest_spectrum, "text/csv",
                                  lambda t: "dense.csv:" in t or "Sample dense.csv" in t),
    "one 20 MB line": (TAB_SPECTRUM, "fg-fit-sample-file", "one_line.csv", _one_line_spectrum, "text/csv",
                       lambda t: "one_line.csv:" in t or "Sample one_line.csv" in t),
    "half a million lamp lines": (TAB_EXPLORER, "fg-lamp-file", "lamp.csv", _many_lines_lamp, "text/csv",
                                  lambda t: "lamp.csv:" in t),
    "a stack file of tables": (TAB_EXPLORER, "fg-stack-file", "tables.json", _table_stack, "application/json",
                               lambda t: "Invented table stack" in t or "tables.json:" in t),
    "24-megapixel photo": (TAB_COLOUR, "fg-photo-drop", "big.png", _photo_png, "image/png",
                           lambda t: "big.png:" in t),
}


@pytest.mark.parametrize("case", list(CASES))
def test_health_answers_within_a_second_while_an_upload_is_read(lab, case):
    tab, css, name, make, mime, outcome = CASES[case]
    data = make()
    with HealthPoller(lab["base"]) as poller:
        time.sleep(0.5)                                      # a few answers before the page opens
        (t0, t1), said, shown = asyncio.run(_drop(lab["base"], tab, css, name, data, mime, outcome))
        time.sleep(0.5)
    samples = poller.samples
    worst = poller.worst(t0, max(t1, t0 + 3 * HEALTH_EVERY_S))           # at least one request judged
    print(f"{case}: {len(data) / 1e6:.1f} MB, said after {t1 - t0:.1f} s; worst /health from the first chunk sent "
          f"to the page's answer {worst * 1000:.0f} ms; page said: {said[:150]!r}")
    assert len(samples) >= 5 and all(ok for _, _, ok in samples), "a /health request failed"
    assert worst <= HEALTH_MAX_S, f"/health took {worst:.2f} s while {name} was uploaded and read"
    assert any(f"Reading {name} …" in t for t in shown), "the page did not say it was reading the file"
    _assert_serving(lab["port"])
    assert lab["proc"].poll() is None
