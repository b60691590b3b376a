"""The page's file drop zones: the size cap holds on the server chunk by chunk, whatever a client sends."""

from __future__ import annotations

from types import SimpleNamespace

import pytest
from hypothesis import given, settings, strategies as st

from views.limits import UPLOAD_CHUNK_BYTES, upload_cap_bytes
from views.uploads import CappedDropper, browser_size_text


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
