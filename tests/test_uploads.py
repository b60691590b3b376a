"""The page's uploads: the size cap holds on the server chunk by chunk, whatever a client sends; every
parser of a user's file stops at its line bound, its line length and its time budget; and a served page
reads files in a worker thread, applies them on its next tick, and lets a newer file supersede an older one.
"""

from __future__ import annotations

import json
import queue
import threading
import time
from types import SimpleNamespace

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings, strategies as st
from panel.io.state import set_curdoc

import physics.fit as fit
import physics.stackfile as stackfile
from physics import InputError
from physics.fit import MAX_LINE_CHARS, MAX_SPECTRUM_LINES, read_spectrum, read_spectrum_table, text_lines
from views.limits import UPLOAD_CHUNK_BYTES, upload_cap_bytes
from views.explorer import Field
from views.uploads import CappedDropper, UploadReader, browser_size_text


class Recorder:
    def __init__(self):
        self.files, self.refusals = [], []

    def dropper(self, cap=1000, **params):
        return CappedDropper(cap, lambda name, data: self.files.append((name, data)), self.refusals.append,
                             what="The test file", **params)


def _chunk(d, name, chunk, total, data, mime="text/csv"):
    d._process_event(SimpleNamespace(event_name="upload_event", data=dict(
        name=name, chunk=chunk, total_chunks=total, data=data, type=mime)))


def _held(d) -> int:
    return sum(len(b) for parts in d._file_buffer.values() for b in parts)


def test_a_file_at_the_cap_is_handed_over_as_bytes_and_not_kept():
    r = Recorder()
    d = r.dropper(cap=1000, chunk_size=300)
    data = ("nm,R\n" + "500,0.25\n" * 110)[:1000].encode()
    d.receive("ok.csv", data, "text/csv")                     # text/* arrives decoded; handed back as bytes
    assert r.files == [("ok.csv", data)] and r.refusals == []
    assert d.value == {} and d.mime_type == {} and _held(d) == 0


def test_text_that_is_not_utf8_is_handed_over_unchanged():
    r = Recorder()
    d = r.dropper()
    data = "nm;R\n500;0,25 µ\n".encode("latin-1")
    d.receive("latin.csv", data, "text/csv")
    assert r.files == [("latin.csv", data)]


def test_a_file_over_the_cap_is_dropped_as_it_arrives_and_said_once():
    r = Recorder()
    d = r.dropper(cap=1000)
    for i in range(1, 50):
        _chunk(d, "big.csv", i, 10**6, b"x" * 400)
        assert _held(d) <= 1000
    assert r.files == [] and len(r.refusals) == 1
    assert "big.csv is larger than this server accepts" in r.refusals[0] and "nothing of it was kept" in r.refusals[0]
    assert _held(d) == 0
    d.receive("small.csv", b"1,2\n", "text/csv")               # the next file is taken
    assert r.files == [("small.csv", b"1,2\n")]


@pytest.mark.parametrize("event, words", [
    (dict(name="a.csv", chunk=3, total_chunks=5, data=b"x", type="text/csv"), "out of order"),
    (dict(name="a.csv", chunk="1", total_chunks=5, data=b"x", type="text/csv"), "garbled"),
    (dict(name="a.csv", chunk=2, total_chunks=1, data=b"x", type="text/csv"), "garbled"),
    (dict(name="a.csv", chunk=0, total_chunks=1, data=b"x", type="text/csv"), "garbled"),
    (dict(name="", chunk=1, total_chunks=1, data=b"x", type="text/csv"), "garbled"),
    (dict(name=["a"], chunk=1, total_chunks=1, data=b"x", type="text/csv"), "garbled"),
    (dict(name="a.csv", chunk=1, total_chunks=1, data="x", type="text/csv"), "garbled"),
    (dict(name="a.csv", chunk=1, total_chunks=1, data=b"x", type=None), "garbled"),
    (dict(name="a.csv", chunk=1, total_chunks=1), "garbled"),
    ("not a dict", "garbled"),
])
def test_a_malformed_chunk_is_refused_with_a_message(event, words):
    r = Recorder()
    d = r.dropper()
    d._process_event(SimpleNamespace(event_name="upload_event", data=event))
    assert r.files == [] and len(r.refusals) == 1 and words in r.refusals[0]


def test_a_new_file_drops_an_unfinished_one():
    r = Recorder()
    d = r.dropper(cap=1000)
    _chunk(d, "first.csv", 1, 3, b"a" * 300)
    _chunk(d, "second.csv", 1, 1, b"b" * 10)
    assert r.files == [("second.csv", b"b" * 10)] and _held(d) == 0
    _chunk(d, "first.csv", 2, 3, b"a" * 300)                  # the rest of the dropped one is refused
    assert len(r.refusals) == 1 and "out of order" in r.refusals[0] and _held(d) == 0


def test_removing_a_file_in_the_browser_changes_nothing():
    r = Recorder()
    d = r.dropper()
    d.receive("a.csv", b"1,2\n")
    d._process_event(SimpleNamespace(event_name="delete_event", data={"name": "a.csv"}))
    assert r.files == [("a.csv", b"1,2\n")] and r.refusals == []


@settings(max_examples=200, deadline=None)
@given(st.lists(st.tuples(st.sampled_from(["a", "b", "c.png"]), st.integers(-2, 8), st.integers(-2, 8),
                          st.integers(0, 700)), max_size=40))
def test_whatever_chunks_arrive_the_server_holds_at_most_the_cap(events):
    r = Recorder()
    d = r.dropper(cap=1000)
    for name, chunk, total, size in events:
        _chunk(d, name, chunk, total, b"z" * size, "image/png")
        assert _held(d) <= 1000
    assert all(len(data) <= 1000 for _, data in r.files)


def test_the_browser_check_is_never_looser_than_the_server():
    for cap in (1, 999, 1000, 1_000_000, 200 * 2**20):
        kb = int(browser_size_text(cap)[:-2])
        assert kb * 1000 <= max(cap, 1000)
    d = Recorder().dropper(cap=2_000_000)
    root = d.get_root()                                        # the model builds: the cap stays on the server
    assert root.max_file_size == "2000KB" and root.chunk_size == UPLOAD_CHUNK_BYTES
    assert not hasattr(root, "cap_bytes")


def test_every_upload_on_the_page_goes_through_a_capped_drop_zone():
    from physics.stackfile import MAX_FILE_BYTES as STACK_BYTES
    from views.explorer import FilmExplorer
    from views.fit import FILE_ROLES, MAX_UPLOAD_BYTES as SPECTRUM_BYTES, SpectrumFitSection
    from views.inverse import ColourToThickness, MAX_UPLOAD_BYTES as PHOTO_BYTES
    from views.state import MAX_SPD_BYTES

    ex = FilmExplorer()
    fit, colour = SpectrumFitSection(ex), ColourToThickness(ex)
    zones = [(ex.file_in, STACK_BYTES), (ex.spd_in, MAX_SPD_BYTES), (colour.dropper, PHOTO_BYTES)]
    zones += [(fit.file_in[role], SPECTRUM_BYTES) for role in FILE_ROLES]
    for zone, kind_cap in zones:
        assert isinstance(zone, CappedDropper) and zone.cap_bytes == upload_cap_bytes(kind_cap)


# ---------------------------------------------------------------------- sizes
def test_sizes_are_said_in_megabytes_of_a_million_bytes():
    from views.fit import MAX_UPLOAD_BYTES as SPECTRUM_BYTES
    from views.uploads import MB, size_text, too_large

    assert MB == 10**6 and SPECTRUM_BYTES == 20 * MB
    assert [size_text(n) for n in (20_000_000, 1_500_000, 2 * 2**20, 300_000)] == ["20 MB", "1.5 MB", "2.1 MB",
                                                                                  "0.3 MB"]
    r = Recorder()
    d = CappedDropper(SPECTRUM_BYTES, r.files.append, r.refusals.append, what="The spectrum file")
    d.receive("big.csv", b"1" * (SPECTRUM_BYTES + 1))
    assert "(20 MB)" in r.refusals[0] and "19.1" not in r.refusals[0]
    assert too_large("a.csv", SPECTRUM_BYTES, SPECTRUM_BYTES) is None
    assert too_large("a.csv", 30_000_000, SPECTRUM_BYTES) == "a.csv is 30 MB; this server accepts up to 20 MB for it."
    # a file just over the cap is not "20 MB, up to 20 MB": the bytes are given
    assert "20,000,001 bytes" in too_large("a.csv", SPECTRUM_BYTES + 1, SPECTRUM_BYTES, "Export just two columns.")


# ---------------------------------------------------------------------- bounded parsers
@settings(max_examples=300, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(st.text(alphabet="a1,;. \t\r\n\v\f\x1c\x85\u2028", max_size=80), st.integers(4, 12))
def test_lines_are_split_as_splitlines_splits_them_a_block_at_a_time(monkeypatch, text, block):
    monkeypatch.setattr(fit, "_LINE_BLOCK_CHARS", block)
    limit = block - 3
    try:
        got = [line for _, line in text_lines(text, what="file", max_lines=10**6, budget_s=60, fix="",
                                              max_line_chars=limit)]
    except InputError as exc:
        assert "longer than" in str(exc) and any(len(line) > limit for line in text.splitlines())
    else:
        assert got == text.splitlines()


def test_a_spectrum_of_millions_of_lines_is_refused_at_the_line_bound():
    seen = []
    with pytest.raises(InputError) as info:                           # counted before reading: refused at once
        read_spectrum_table(b"4,1\n" * 4_000_000, progress=seen.append)
    assert f"more than {MAX_SPECTRUM_LINES:,} lines" in str(info.value) and "every 1 nm" in str(info.value)
    assert "crop the band" in str(info.value) and seen == []
    with pytest.raises(InputError, match=f"more than {MAX_SPECTRUM_LINES:,} lines"):
        read_spectrum_table(b"4,1\r" * 4_000_000, progress=seen.append)     # old Mac line ends: found while read
    assert seen and max(seen) <= MAX_SPECTRUM_LINES                  # it stopped there: the rest was never read
    wl = np.linspace(400.0, 800.0, MAX_SPECTRUM_LINES - 1)              # a header and as many rows as allowed
    text = "nm,R\n" + "\n".join(f"{w:.5f},0.3" for w in wl)
    assert read_spectrum(text.encode()).wavelength_nm.size == wl.size


def test_a_giant_line_is_refused_before_it_is_split(monkeypatch):
    split = fit._split
    longest = []
    monkeypatch.setattr(fit, "_split", lambda line: longest.append(len(line)) or split(line))
    for content in (b"400.5;0.25;" * 1_800_000, b"9" * 19_000_000, b"nm,R\n" + b"400,0.1 " * 2_000_000):
        with pytest.raises(InputError, match="longer than 4,096 characters"):
            read_spectrum(content)
    assert max(longest, default=0) <= MAX_LINE_CHARS


def test_reading_stops_at_its_time_budget(monkeypatch):
    monkeypatch.setattr(fit, "SPECTRUM_READ_BUDGET_S", -1.0)
    with pytest.raises(InputError, match="took longer than -1 s"):
        read_spectrum(b"400,0.1\n" * 3000)


def test_a_stopped_reading_raises_what_the_progress_raised():
    class Stop(Exception):
        pass

    def stop(lines):
        raise Stop
    with pytest.raises(Stop):
        read_spectrum(b"400,0.1\n" * 30_000, progress=stop)


def test_the_lamp_spectrum_reader_is_bounded_too():
    from views.state import MAX_SPD_LINES, parse_spd_csv

    with pytest.raises(InputError, match=f"more than {MAX_SPD_LINES:,} lines"):
        parse_spd_csv(b"500,1\n" * 330_000)
    with pytest.raises(InputError, match="longer than 4,096 characters"):
        parse_spd_csv(b"500,1;" * 300_000)
    with pytest.raises(InputError, match="larger than 2 MB"):
        parse_spd_csv(b"5" * 2_000_001)
    wl, v = parse_spd_csv(("\n".join(f"{380 + 0.02 * i:.2f},1" for i in range(MAX_SPD_LINES))).encode())
    assert wl.size == MAX_SPD_LINES


def test_the_stack_file_reader_is_bounded_in_rows_and_time(monkeypatch):
    def stack(rows):
        return json.dumps({"format": "fringegauge-stack", "version": 1, "ambient": "air", "substrate": "Si",
                           "layers": [{"material": {"kind": "table", "wavelength_nm": list(range(300, 300 + rows)),
                                                    "n": [1.5] * rows}, "thickness_nm": 100}]})
    assert stackfile.load_stack_file(stack(stackfile.MAX_TABLE_POINTS)).stack.layers
    with pytest.raises(InputError, match=f"give 1 to {stackfile.MAX_TABLE_POINTS}"):
        stackfile.load_stack_file(stack(stackfile.MAX_TABLE_POINTS + 1))
    monkeypatch.setattr(stackfile, "STACK_READ_BUDGET_S", -1.0)
    with pytest.raises(InputError, match="took longer than -1 s"):
        stackfile.load_stack_file(stack(20))


# ---------------------------------------------------------------------- reading off the event loop
class ServedPage:
    """Stands in for a served page's document: ``views.limits.served`` is True for it and what is posted to
    its next tick waits in a queue until :meth:`tick` runs it, on the test's own thread (the event loop)."""

    def __init__(self):
        self.session_context = object()
        self.posted = queue.Queue()

    def add_next_tick_callback(self, fn):
        self.posted.put(fn)

    def tick(self, timeout_s=30.0):
        """Run the next posted callback (waiting for a worker to post one)."""
        self.posted.get(timeout=timeout_s)()

    def tick_until(self, condition, timeout_s=30.0):
        deadline = time.monotonic() + timeout_s
        while not condition():
            self.tick(max(0.01, deadline - time.monotonic()))


def _status(reader) -> str:
    return reader.message.object if reader.message.visible else ""


def test_served_uploads_are_read_in_a_worker_thread_and_applied_on_the_next_tick():
    page = ServedPage()
    reader = UploadReader(Field(""))
    threads, applied, failed = [], [], []

    def parse(progress):
        threads.append(threading.current_thread())
        return read_spectrum_table(b"nm,R\n" + b"400,0.1\n401,0.2\n" * 20, progress=progress)
    with set_curdoc(page):
        assert reader.read("wafer.csv", parse, applied.append, failed.append) is True
        assert "Reading wafer.csv …" in _status(reader) and reader.reading and applied == []
        page.tick_until(lambda: applied or failed)
    assert threads and threads[0] is not threading.current_thread()
    assert applied[0].rows.shape == (40, 2) and failed == [] and _status(reader) == "" and not reader.reading


def test_a_refused_file_says_why_on_the_next_tick():
    page = ServedPage()
    reader = UploadReader(Field(""))
    applied, failed = [], []
    with set_curdoc(page):
        reader.read("one_line.csv", lambda progress: read_spectrum_table(b"1;" * 10_000, progress=progress),
                    applied.append, failed.append)
        page.tick_until(lambda: failed)
    assert applied == [] and "longer than 4,096 characters" in failed[0] and _status(reader) == ""


def test_a_newer_file_supersedes_one_still_being_read():
    page = ServedPage()
    reader = UploadReader(Field(""))
    applied, failed, counts = [], [], []
    release = threading.Event()

    def slow(progress):
        for lines in range(1, 10**6):
            release.wait(0.01)
            counts.append(lines)
            progress(lines)                           # raises once a newer file has come
        return "old"
    with set_curdoc(page):
        reader.read("old.csv", slow, applied.append, failed.append)
        page.tick_until(lambda: counts)               # the old file is being read
        reader.read("new.csv", lambda progress: "new", applied.append, failed.append)
        assert "Reading new.csv" in _status(reader)
        page.tick_until(lambda: applied)
        n = len(counts)
        release.set()
        time.sleep(0.2)
        while not page.posted.empty():
            page.tick()
    assert applied == ["new"] and failed == [] and len(counts) <= n + 1     # the old reading stopped


def test_a_newer_file_refused_for_its_size_drops_one_still_being_read():
    page = ServedPage()
    reader = UploadReader(Field(""))
    applied, started, release = [], threading.Event(), threading.Event()

    def slow(progress):
        started.set()
        release.wait(30)
        return "old"
    with set_curdoc(page):
        reader.read("old.csv", slow, applied.append, lambda message: None)
        assert started.wait(10)
        reader.refuse("big.csv is larger than this server accepts for it (20 MB); nothing of it was kept.")
        release.set()
        page.tick()                                   # the old result arrives and is dropped
    assert applied == [] and "big.csv is larger" in reader.message.object and not reader.reading


def test_a_reading_shows_how_many_lines_it_has_read(monkeypatch):
    import views.uploads as uploads

    monkeypatch.setattr(uploads, "PROGRESS_EVERY_S", 0.0)
    page = ServedPage()
    reader = UploadReader(Field(""))
    shown, done = [], threading.Event()

    def parse(progress):
        for lines in (10_000, 20_000):
            progress(lines)
        done.wait(30)
        return "read"
    with set_curdoc(page):
        reader.read("long.csv", parse, lambda result: None, lambda message: None)
        page.tick()
        shown.append(_status(reader))
        page.tick()
        shown.append(_status(reader))
        done.set()
        page.tick()
    assert "Reading long.csv … (10,000 lines so far)" in shown[0] and "(20,000 lines so far)" in shown[1]


def test_a_page_that_has_gone_stops_its_reading():
    page = ServedPage()
    reader = UploadReader(Field(""))
    stopped = threading.Event()

    def parse(progress):
        try:
            while True:
                time.sleep(0.005)
                progress(1)
        finally:
            stopped.set()
    with set_curdoc(page):
        reader.read("big.csv", parse, lambda result: None, lambda message: None)
    page.session_context = None                       # Bokeh destroyed the session
    assert stopped.wait(10) and page.posted.empty()


def test_outside_a_server_a_file_is_read_at_once():
    reader = UploadReader(Field(""))
    failed = []
    assert reader.read("a.csv", lambda progress: 41, lambda result: result + 1, failed.append) == 42
    assert reader.read("b.csv", lambda progress: read_spectrum_table(b""), None, failed.append) is False
    assert "usable rows" in failed[0] and not reader.reading


def test_the_spectrum_section_reads_served_uploads_off_the_loop(monkeypatch):
    import views.fit as vfit
    from views.explorer import FilmExplorer

    section = vfit.SpectrumFitSection(FilmExplorer())
    page = ServedPage()
    threads = []
    real = vfit.read_spectrum_table

    def spy(data, **kw):
        threads.append(threading.current_thread())
        return real(data, **kw)
    monkeypatch.setattr(vfit, "read_spectrum_table", spy)
    wl = np.linspace(400.0, 800.0, 300)
    content = ("nm,R\n" + "\n".join(f"{w:.2f},{0.3 + 0.1 * np.sin(w / 20):.4f}" for w in wl)).encode()
    with set_curdoc(page):
        assert section.load_file("sample", content, "wafer.csv") is True
        assert section.spectrum is None and "Reading wafer.csv" in section.file_msg["sample"].message.object
        page.tick_until(lambda: section.spectrum is not None)
        while not page.posted.empty():
            page.tick()
    assert threads and threads[0] is not threading.current_thread()
    assert section.spectrum[0].size == 300 and not section.file_msg["sample"].message.visible
    name, table = section.files["sample"]
    assert name == "wafer.csv" and not isinstance(table, (bytes, str))    # the page keeps numbers, not the upload


def test_a_file_of_another_kind_is_refused_by_extension_and_replaces_the_old_message():
    """The zone names the file kinds it takes by extension (never a blank MIME list) and its message
    replaces the one of the file before."""
    from views.explorer import FilmExplorer

    ex = FilmExplorer()
    ex.file_msg.show_error("an older message about another file")
    assert ex.file_in.extensions == (".json",) and ex.file_in.accepted_filetypes == []
    ex.file_in.receive("measurements/run 7.csv", b"wavelength,R\n500,0.3\n")
    text = ex.file_msg.message.object
    assert "run 7.csv was not read" in text and "must be a .json file" in text and "older message" not in text
    assert "measurements" not in text and "application/json" not in text
    r = Recorder()
    d = r.dropper(accepted_filetypes=[".csv", ".txt", "text/csv"])
    d.receive("photo.PNG", b"x" * 10)
    d.receive("spectrum.TXT", b"1,2\n")
    assert r.refusals == ["photo.PNG was not read: the test file must be a .csv or .txt file."]
    assert [n for n, _ in r.files] == ["spectrum.TXT"]


def test_an_unknown_material_in_a_stack_file_points_to_the_page_s_search_box():
    """The page never tells a browser user to call a Python function; the API message still may."""
    from physics import material
    from views.explorer import FilmExplorer

    with pytest.raises(InputError, match=r"search_materials\(\)"):
        material("unobtainium")
    ex = FilmExplorer()
    stack = json.loads(stackfile.PRESET_DIR.joinpath("thermal_oxide_on_silicon.json").read_text())
    stack["layers"][0]["material"] = "unobtainium"
    ex.file_in.receive("odd.json", json.dumps(stack).encode())
    text = ex.file_msg.message.object
    assert "Unknown material" in text and "Find a material" in text and "search_materials" not in text


def test_an_unknown_material_typed_in_a_layer_row_points_to_the_search_box():
    from views.explorer import FilmExplorer

    ex = FilmExplorer()
    row = ex.layers_box.objects[0]
    row.objects[0].objects[0].value = "unobtainium"                  # the row's material field
    text = row.objects[1].object
    assert "Unknown material" in text and "Find a material" in text and "search_materials" not in text
