"""Tests for the shared lab library (library.store)."""

from __future__ import annotations

import errno
import json
import os
import shutil
import tempfile
import threading
from pathlib import Path

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

import library.store as store
from library import (Library, LibraryWriteError, sanitize_name, validate_calibration)
from physics.errors import InputError

REPO = Path(__file__).resolve().parent.parent
STACK_PRESETS = sorted((REPO / "presets").glob("*.json"))
GRATING_PRESETS = sorted((REPO / "presets" / "gratings").glob("*.json"))
CALIBRATION = json.dumps({"name": "Wafer 7 corner", "box": [10, 20, 110, 220],
                          "reference": "substrate", "note": "bare Si corner"}, indent=2) + "\n"


def _preset(path: Path) -> str:
    return path.read_text(encoding="utf-8")


def _tree(folder: Path) -> dict:
    """Every file and folder under ``folder`` with its size and mtime."""
    out = {}
    for dirpath, dirnames, filenames in os.walk(folder):
        for n in dirnames + filenames:
            p = Path(dirpath) / n
            st_ = p.lstat()
            out[str(p.relative_to(folder))] = (st_.st_size, st_.st_mtime_ns)
    return out


def _leftovers(folder: Path) -> list:
    return [p.name for p in folder.rglob("*") if p.name.startswith(".tmp-")]


def _can_write(folder: Path) -> bool:
    try:
        probe = folder / "probe"
        probe.write_text("x")
        probe.unlink()
        return True
    except OSError:
        return False


@pytest.fixture(autouse=True, scope="module")
def _key_file(tmp_path_factory):
    """Every library here signs with a key in a temporary folder, never one in the home folder."""
    with pytest.MonkeyPatch.context() as mp:
        mp.setenv(store.KEY_FILE_ENV, str(tmp_path_factory.mktemp("key") / "library.key"))
        yield


@pytest.fixture
def lib(tmp_path):
    return Library(tmp_path / "lab")


# ---------------------------------------------------------------------- round trips
def test_presets_exist():
    assert STACK_PRESETS and GRATING_PRESETS


@pytest.mark.parametrize("path", STACK_PRESETS, ids=lambda p: p.stem)
def test_stack_round_trip(lib, path):
    text = _preset(path)
    res = lib.save("stacks", path.stem, text, user="ann")
    assert res.version == 1 and res.path_name == f"{path.stem}.json"
    assert path.stem in res.message
    assert lib.load("stacks", path.stem) == text
    [entry] = lib.list("stacks")
    assert (entry.name, entry.version, entry.user, entry.size) == (path.stem, 1, "ann", len(text.encode()))
    assert entry.saved_at.endswith("+00:00")
    assert lib.list_problems("stacks") == []


@pytest.mark.parametrize("path", GRATING_PRESETS, ids=lambda p: p.stem)
def test_grating_round_trip(lib, path):
    text = _preset(path)
    lib.save("gratings", path.stem, text, user="bob")
    assert lib.load("gratings", path.stem) == text
    assert [e.name for e in lib.list("gratings")] == [path.stem]


def test_calibration_round_trip(lib):
    lib.save("calibrations", "Wafer 7", CALIBRATION, user="cy")
    assert lib.load("calibrations", "Wafer 7") == CALIBRATION
    assert lib.list("calibrations")[0].user == "cy"
    assert lib.list("stacks") == [] and lib.list_problems("stacks") == []


def test_wrong_kind_content_refused(lib):
    with pytest.raises(InputError):
        lib.save("stacks", "x", _preset(GRATING_PRESETS[0]), user="a")
    with pytest.raises(InputError):
        lib.save("gratings", "x", _preset(STACK_PRESETS[0]), user="a")
    with pytest.raises(InputError, match="Unknown library kind"):
        lib.save("secrets", "x", CALIBRATION, user="a")
    assert not (lib.root / "stacks").exists() or not any((lib.root / "stacks").glob("*.json"))


@pytest.mark.parametrize("bad, field", [
    ({"box": [0, 0, 1, 1], "reference": "substrate"}, "name"),
    ({"name": "a", "box": [0, 0, 1], "reference": "substrate"}, "box"),
    ({"name": "a", "box": [5, 0, 1, 1], "reference": "substrate"}, "box"),
    ({"name": "a", "box": [0, 0, 1, 1], "reference": "air"}, "reference"),
    ({"name": "a", "box": [0, 0, 1, 1], "reference": True}, "reference"),
    ({"name": "a", "box": [0, 0, 1, 1], "reference": 1, "extra": 1}, "extra"),
    ({"name": "a", "box": [0, -1, 1, 1], "reference": 1}, "box[1]"),
])
def test_calibration_validator(bad, field):
    with pytest.raises(InputError, match=f"^'?{field.replace('[', '.').replace(']', '.')}"):
        validate_calibration(json.dumps(bad))
    validate_calibration(json.dumps({"name": "a", "box": [0, 0, 1, 1], "reference": 2.5}))
    with pytest.raises(InputError):
        validate_calibration('{"name": "a", "box": [0, 0, 1, NaN], "reference": 1}')


# ---------------------------------------------------------------------- versions
def test_second_save_becomes_version_2(lib):
    text = _preset(STACK_PRESETS[0])
    lib.save("stacks", "Oxide", text, user="ann")
    res = lib.save("stacks", "Oxide", text, user="bob")
    assert res.version == 2 and res.path_name == "Oxide.v2.json"
    assert res.message.startswith("A stack named 'Oxide' already exists (saved by ann (typed name) on ")
    assert res.message.endswith("yours is saved as version 2.")
    res3 = lib.save("stacks", "Oxide", text, user="cy")
    assert "saved by bob (typed name)" in res3.message and "version 3" in res3.message
    entries = lib.list("stacks")
    assert [e.version for e in entries] == [3, 2, 1]          # newest first
    assert lib.load("stacks", "Oxide", 1) == text
    with pytest.raises(InputError, match="no version 9"):
        lib.load("stacks", "Oxide", 9)
    with pytest.raises(InputError, match="no stack named"):
        lib.load("stacks", "Nothing")


def test_concurrent_saves_get_distinct_versions(lib):
    n = 8
    barrier = threading.Barrier(n)
    results, errors = [None] * n, []

    def worker(i):
        text = json.dumps({"name": f"by thread {i}", "box": [0, 0, 10 + i, 10], "reference": i})
        barrier.wait()
        try:
            results[i] = (lib.save("calibrations", "Shared", text, user=f"u{i}"), text)
        except Exception as exc:       # pragma: no cover - reported below
            errors.append(exc)

    threads = [threading.Thread(target=worker, args=(i,)) for i in range(n)]
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    assert not errors
    versions = sorted(r.version for r, _ in results)
    assert versions == list(range(1, n + 1))
    for res, text in results:
        assert lib.load("calibrations", "Shared", res.version) == text
    assert len(lib.list("calibrations")) == n and lib.list_problems("calibrations") == []
    assert _leftovers(lib.root) == []


# ---------------------------------------------------------------------- atomicity and failures
def test_crash_at_replace_leaves_old_file_and_no_temp(lib, monkeypatch):
    text = _preset(STACK_PRESETS[0])
    lib.save("stacks", "Oxide", text, user="ann")
    before = _tree(lib.root / "stacks")

    def boom(*args, **kwargs):
        raise OSError(errno.EIO, "simulated crash")

    monkeypatch.setattr(os, "replace", boom)
    with pytest.raises(LibraryWriteError, match="cannot be written"):
        lib.save("stacks", "Oxide", text.replace("Thermal", "Warm"), user="bob")
    monkeypatch.undo()
    after = _tree(lib.root / "stacks")
    assert {k for k in after if k != ".lock"} == {k for k in before if k != ".lock"}
    assert _leftovers(lib.root) == []
    assert lib.load("stacks", "Oxide") == text
    assert [e.version for e in lib.list("stacks")] == [1]


def test_crash_at_metadata_rolls_back_the_data_file(lib, monkeypatch):
    real_replace = os.replace
    calls = []

    def second_fails(src, dst, **dir_fds):
        calls.append(dst)
        if len(calls) == 2:
            raise OSError(errno.EIO, "simulated crash")
        return real_replace(src, dst, **dir_fds)

    monkeypatch.setattr(os, "replace", second_fails)
    with pytest.raises(LibraryWriteError):
        lib.save("calibrations", "Wafer", CALIBRATION, user="a")
    monkeypatch.undo()
    assert [p.name for p in (lib.root / "calibrations").iterdir() if p.name != ".lock"] == []
    assert lib.save("calibrations", "Wafer", CALIBRATION, user="a").version == 1


def test_non_oserror_crash_also_cleans_up(lib, monkeypatch):
    def crash(*args, **kwargs):
        raise KeyboardInterrupt

    monkeypatch.setattr(store, "_write_bytes", crash)
    with pytest.raises(KeyboardInterrupt):
        lib.save("calibrations", "Wafer", CALIBRATION, user="a")
    assert _leftovers(lib.root) == []


@pytest.mark.parametrize("where", ["write", "fsync"])
def test_disk_full_gives_library_write_error(lib, monkeypatch, where):
    lib.save("calibrations", "Wafer", CALIBRATION, user="a")
    before = _tree(lib.root)

    def full(*args, **kwargs):
        raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))

    monkeypatch.setattr(store, "_write_bytes", full) if where == "write" else \
        monkeypatch.setattr(os, "fsync", full)
    with pytest.raises(LibraryWriteError) as info:
        lib.save("calibrations", "Wafer", CALIBRATION, user="b")
    monkeypatch.undo()
    msg = str(info.value)
    assert "cannot be written (read-only or full)" in msg and "download it as a file" in msg
    assert isinstance(info.value, InputError)
    assert _leftovers(lib.root) == []
    after = _tree(lib.root)
    assert {k for k in after if not k.endswith(".lock")} == {k for k in before if not k.endswith(".lock")}
    assert [e.version for e in lib.list("calibrations")] == [1]


def test_read_only_folder_chmod(tmp_path):
    root = tmp_path / "lab"
    lib = Library(root)
    lib.save("calibrations", "Wafer", CALIBRATION, user="a")
    folder = root / "calibrations"
    os.chmod(folder, 0o555)
    try:
        if _can_write(folder):
            pytest.skip("chmod does not stop this user from writing (running as root)")
        with pytest.raises(LibraryWriteError, match="read-only or full"):
            lib.save("calibrations", "Wafer", CALIBRATION, user="b")
        assert lib.load("calibrations", "Wafer") == CALIBRATION   # reading still works
        assert _leftovers(root) == []
    finally:
        os.chmod(folder, 0o755)


def test_read_only_folder_simulated(lib, monkeypatch):
    lib.save("calibrations", "Wafer", CALIBRATION, user="a")

    def read_only(*args, **kwargs):
        raise OSError(errno.EROFS, os.strerror(errno.EROFS))

    monkeypatch.setattr(store, "_create_temp", read_only)
    with pytest.raises(LibraryWriteError, match="read-only or full"):
        lib.save("calibrations", "Wafer", CALIBRATION, user="b")
    monkeypatch.undo()
    assert [e.version for e in lib.list("calibrations")] == [1]
    assert _leftovers(lib.root) == []


def test_oversize_content_refused(lib):
    big = CALIBRATION[:-2] + ', "note": "' + "x" * 1_000_001 + '"}'
    with pytest.raises(InputError, match="1 MB"):
        lib.save("calibrations", "Big", big, user="a")
    with pytest.raises(InputError, match="1 MB"):
        lib.save("calibrations", "Big", "é" * 600_000, user="a")   # 1.2 MB of UTF-8
    assert lib.list("calibrations") == []


# ---------------------------------------------------------------------- corrupt and hand-edited files
def test_corrupt_and_hand_edited_files_are_skipped_and_reported(lib):
    good = _preset(STACK_PRESETS[0])
    for name in ("Good", "Edited", "Broken", "No meta", "Bad meta"):
        lib.save("stacks", name, good, user="ann")
    folder = lib.root / "stacks"
    # hand edit that keeps the file valid: still refused (checksum)
    (folder / "Edited.json").write_text(good + "\n", encoding="utf-8")
    (folder / "Broken.json").write_text("{ not json", encoding="utf-8")
    (folder / "No meta.json.meta.json").unlink()
    (folder / "Bad meta.json.meta.json").write_text("[]", encoding="utf-8")
    (folder / "copied in.json").write_text(good, encoding="utf-8")       # no sidecar
    (folder / "notes.txt").write_text("hello", encoding="utf-8")
    (folder / "Orphan.json.meta.json").write_text("{}", encoding="utf-8")
    (folder / "weird.v01.json").write_text(good, encoding="utf-8")
    entries = lib.list("stacks")
    assert [e.name for e in entries] == ["Good"]
    problems = {p.file_name: p.message for p in lib.list_problems("stacks")}
    assert set(problems) == {"Edited.json", "Broken.json", "No meta.json", "Bad meta.json",
                             "copied in.json", "notes.txt", "Orphan.json.meta.json", "weird.v01.json"}
    assert "changed outside fringegauge" in problems["Edited.json"]
    assert "metadata" in problems["No meta.json"]
    assert all(m.endswith(".") for m in problems.values())
    for name in ("Edited", "Broken", "No meta", "Bad meta", "copied in"):
        with pytest.raises(InputError, match=f"'{name}' \\(version 1\\) cannot be loaded"):
            lib.load("stacks", name)
    # a corrupt file's name still takes the next version
    assert lib.save("stacks", "Broken", good, user="bob").version == 2
    assert lib.load("stacks", "Broken") == good


def test_valid_sidecar_but_invalid_content_is_reported(lib):
    lib.save("stacks", "S", _preset(STACK_PRESETS[0]), user="a")
    folder = lib.root / "stacks"
    bad = b'{"format": "fringegauge-stack"}'
    (folder / "S.json").write_bytes(bad)
    meta = json.loads((folder / "S.json.meta.json").read_text())
    import hashlib
    meta.update(size=len(bad), sha256=hashlib.sha256(bad).hexdigest())
    meta["hmac"] = store.meta_mac(lib.signing_key(), meta)              # signed as the server would
    (folder / "S.json.meta.json").write_text(json.dumps(meta))
    assert lib.list("stacks") == []
    [problem] = lib.list_problems("stacks")
    assert "not a valid stack file" in problem.message


def test_symlink_out_of_root_is_skipped(tmp_path):
    outside = tmp_path / "outside.json"
    outside.write_text(_preset(STACK_PRESETS[0]))
    lib = Library(tmp_path / "lab")
    lib.save("stacks", "S", _preset(STACK_PRESETS[0]), user="a")
    os.symlink(outside, tmp_path / "lab" / "stacks" / "Link.json")
    assert [e.name for e in lib.list("stacks")] == ["S"]
    assert "is a link" in {p.file_name: p.message for p in lib.list_problems("stacks")}["Link.json"]


# ---------------------------------------------------------------------- archive
def test_archive_moves_and_never_deletes(lib):
    text = _preset(GRATING_PRESETS[0])
    lib.save("gratings", "G", text, user="a")
    lib.save("gratings", "G", text, user="b")
    dest = lib.archive("gratings", "G", 2)
    arch = lib.root / "gratings" / ".archive"
    assert dest == arch / "G.v2.json"
    assert sorted(p.name for p in arch.iterdir()) == ["G.v2.json", "G.v2.json.meta.json"]
    assert (arch / "G.v2.json").read_text() == text
    assert [e.version for e in lib.list("gratings")] == [1]
    assert lib.load("gratings", "G") == text
    # the archived version number is not reused
    assert lib.save("gratings", "G", text, user="c").version == 3
    with pytest.raises(InputError, match="no version 2"):
        lib.archive("gratings", "G", 2)
    # a corrupt file can be archived, clearing the problem
    (lib.root / "gratings" / "G.json").write_text("junk")
    assert lib.list_problems("gratings")
    lib.archive("gratings", "G", 1)
    assert lib.list_problems("gratings") == []


# ---------------------------------------------------------------------- names
@pytest.mark.parametrize("bad, words", [
    ("a/../b", "'a/../b' has '/'"), ("..", "'..'"), ("", "empty"), ("   ", "empty"),
    ("/etc/passwd", "'/'"), ("C:\\x", "':'"), ("a\\b", "'\\\\'"), (".hidden", "starts with a dot"),
    ("a\x00b", "U\\+0000"), ("tab\there", "U\\+0009"), ("CON", "reserved"), ("nul.txt", "reserved"),
    ("Lpt1", "reserved"), ("x" * 81, "at most 80"), ("name.v2", "'.v2'"), ("name.meta", "'.meta'"),
    ("end.", "ends with a dot"), ("a..b", "'..'"), ("a*b", "'\\*'"), ("x\u202ey", "U\\+202E"),
])
def test_bad_names(bad, words):
    with pytest.raises(InputError, match=words):
        sanitize_name(bad)


@pytest.mark.parametrize("good, stored", [
    ("Oxide wafer 7", "Oxide wafer 7"), (" padded ", "padded"), ("run_3-b.final", "run_3-b.final"),
    ("Öl auf Wasser", "Öl auf Wasser"), ("thing.json", "thing"), ("x" * 80, "x" * 80),
    ("e\u0301", "\u00e9"), ("console", "console"),
    ("Gate oxide (line 3), 100+5 nm", "Gate oxide (line 3), 100+5 nm"),
])
def test_good_names(good, stored):
    assert sanitize_name(good) == stored


@settings(max_examples=300)
@given(st.text(max_size=100))
def test_any_name_is_rejected_or_stays_inside_root(text):
    root = Path(tempfile.gettempdir()) / "fg-library-names"
    lib = Library(root)
    try:
        name = sanitize_name(text)
    except InputError as exc:
        assert str(exc).startswith("Library names may use")
        return
    assert name and len(name) <= 80 and not name.startswith(".")
    for version in (1, 2, 123):
        path = lib.path_for("stacks", name, version)
        assert path.resolve().is_relative_to(root.resolve())
        assert path.parent == root / "stacks"
        assert store._parse_file_name(path.name) == (name, version)
    assert sanitize_name(name) == name          # stored names are stable


@settings(max_examples=40)
@given(st.text(alphabet=st.characters(blacklist_categories=("Cs",)), min_size=1, max_size=30))
def test_any_accepted_name_saves_inside_root(text):
    with tempfile.TemporaryDirectory() as tmp:
        parent = Path(tmp)
        (parent / "sibling").mkdir()
        lib = Library(parent / "lab")
        try:
            lib.save("calibrations", text, CALIBRATION, user="a")
        except InputError:
            assert not (parent / "lab").exists() or not list((parent / "lab").rglob("*.json"))
            return
        assert list((parent / "sibling").iterdir()) == []
        assert [p.name for p in parent.iterdir()] in (["lab", "sibling"], ["sibling", "lab"])
        [entry] = lib.list("calibrations")
        assert lib.load("calibrations", entry.name) == CALIBRATION


# ---------------------------------------------------------------------- arbitrary content
_numbers = st.one_of(st.integers(-10, 5000), st.floats(allow_nan=True, allow_infinity=True))
_calibrations = st.fixed_dictionaries(
    {"name": st.text(max_size=20), "box": st.lists(_numbers, min_size=3, max_size=5),
     "reference": st.one_of(st.just("substrate"), _numbers, st.text(max_size=5))},
    optional={"note": st.text(max_size=50)},
).map(lambda d: json.dumps(d, ensure_ascii=False))
_stack_texts = st.builds(
    lambda text, name, indent: json.dumps({**json.loads(text), "name": name}, indent=indent,
                                          ensure_ascii=False),
    st.sampled_from([_preset(p) for p in STACK_PRESETS]), st.text(max_size=210),
    st.sampled_from([None, 1, 2]))
_contents = st.one_of(st.text(max_size=200), _calibrations,
                      st.sampled_from([CALIBRATION, CALIBRATION.replace("\n", "\r\n"),
                                       "\ufeff" + CALIBRATION]))


@settings(max_examples=150)
@given(_contents)
def test_any_calibration_content_round_trips_or_is_refused(content):
    with tempfile.TemporaryDirectory() as tmp:
        lib = Library(tmp)
        try:
            res = lib.save("calibrations", "c", content, user="a")
        except InputError as exc:
            assert str(exc).strip()
            assert not list(Path(tmp).rglob("*.json"))
            return
        assert lib.load("calibrations", "c", res.version) == content
        assert lib.list_problems("calibrations") == []


@settings(max_examples=40)
@given(_stack_texts)
def test_any_stack_content_round_trips_or_is_refused(content):
    with tempfile.TemporaryDirectory() as tmp:
        lib = Library(tmp)
        try:
            lib.save("stacks", "s", content, user="a")
        except InputError:
            assert not list(Path(tmp).rglob("*.json"))
            return
        assert lib.load("stacks", "s") == content


# ---------------------------------------------------------------------- confinement
def test_nothing_is_written_outside_root(tmp_path, monkeypatch):
    parent = tmp_path / "parent"
    (parent / "neighbour").mkdir(parents=True)
    (parent / "neighbour" / "keep.txt").write_text("keep")
    root = parent / "lab"
    root.mkdir()                    # the parent's own mtime would change when the root appears
    lib = Library(root)
    monkeypatch.setattr(tempfile, "tempdir", str(tmp_path / "systemp"))   # catch stray temp files
    (tmp_path / "systemp").mkdir()
    outside_before = {k: v for k, v in _tree(tmp_path).items() if not k.startswith("parent/lab")}
    hostile = ["../escape", "..", "/tmp/abs", "neighbour/../../x", "..\\x", "a/b", "\x00", ".x"]
    for name in hostile:
        with pytest.raises(InputError):
            lib.save("stacks", name, _preset(STACK_PRESETS[0]), user="a")
        with pytest.raises(InputError):
            lib.load("stacks", name)
        with pytest.raises(InputError):
            lib.archive("stacks", name, 1)
    with pytest.raises(InputError):
        lib.save("../stacks", "x", CALIBRATION, user="a")
    for i, path in enumerate(STACK_PRESETS):
        lib.save("stacks", "same", _preset(path), user=f"u{i}")
    for path in GRATING_PRESETS:
        lib.save("gratings", path.stem, _preset(path), user="g")
    lib.save("calibrations", "cal", CALIBRATION, user="c")
    lib.archive("stacks", "same", 2)
    lib.list("stacks"), lib.list_problems("stacks"), lib.load("stacks", "same")
    outside_after = {k: v for k, v in _tree(tmp_path).items() if not k.startswith("parent/lab")}
    assert outside_after == outside_before
    assert _leftovers(root) == []
    # a kind folder that is a symlink pointing elsewhere is refused
    shutil.rmtree(root / "calibrations")
    os.symlink(parent / "neighbour", root / "calibrations")
    with pytest.raises(InputError, match="outside the lab library"):
        lib.save("calibrations", "cal", CALIBRATION, user="c")
    assert sorted(p.name for p in (parent / "neighbour").iterdir()) == ["keep.txt"]


# ---------------------------------------------------------------------- names that differ only in case
def test_a_name_in_other_case_joins_the_item_as_first_saved(lib):
    text = _preset(STACK_PRESETS[0])
    assert lib.save("stacks", "Oxide 640 nm", text, user="ann").name == "Oxide 640 nm"
    res = lib.save("stacks", "oxide 640 NM", text, user="bob")
    assert (res.name, res.version, res.path_name) == ("Oxide 640 nm", 2, "Oxide 640 nm.v2.json")
    assert "'Oxide 640 nm' already exists (saved by ann" in res.message
    assert "('oxide 640 NM') is saved as version 2 of 'Oxide 640 nm'" in res.message
    assert [(e.name, e.version) for e in lib.list("stacks")] == [("Oxide 640 nm", 2), ("Oxide 640 nm", 1)]
    assert sorted(p.name for p in (lib.root / "stacks").glob("*.json") if not p.name.endswith(".meta.json")) \
        == ["Oxide 640 nm.json", "Oxide 640 nm.v2.json"]
    assert lib.load("stacks", "OXIDE 640 NM") == text                # found whatever the case
    assert lib.load("stacks", "oxide 640 nm", 1) == text
    lib.archive("stacks", "OXIDE 640 nm", 1)
    assert [e.version for e in lib.list("stacks")] == [2]


def test_a_name_whose_only_versions_are_archived_keeps_its_first_form(lib):
    lib.save("calibrations", "Wafer A", CALIBRATION, user="a")
    lib.archive("calibrations", "Wafer A", 1)
    res = lib.save("calibrations", "WAFER a", CALIBRATION, user="b")
    assert (res.name, res.version) == ("Wafer A", 2)


def test_case_forms_saved_at_once_get_distinct_versions_of_one_item(lib):
    forms = ["Shared", "SHARED", "shared", "sHaReD", "Shared", "SHARED"]
    barrier = threading.Barrier(len(forms))
    results = []

    def worker(form):
        barrier.wait()
        results.append(lib.save("calibrations", form, CALIBRATION, user=form))

    threads = [threading.Thread(target=worker, args=(f,)) for f in forms]
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    assert sorted(r.version for r in results) == list(range(1, len(forms) + 1))
    assert len({r.name for r in results}) == 1
    assert len(lib.list("calibrations")) == len(forms)


def test_folders_with_case_forms_from_before_stay_readable(lib, monkeypatch):
    """A folder written when case still made two items: both stay listed and loadable, and a new save
    joins one of them with a version number neither uses (no file can collide on a case-blind share)."""
    text = _preset(STACK_PRESETS[0])
    monkeypatch.setattr(store, "name_key", lambda name: name)       # the earlier, case-sensitive identity
    lib.save("stacks", "Oxide", text, user="first")
    lib.save("stacks", "Oxide", text, user="second")
    lib.save("stacks", "OXIDE", text, user="third")
    monkeypatch.undo()
    before = _tree(lib.root / "stacks")
    assert sorted((e.name, e.version) for e in lib.list("stacks")) == [("OXIDE", 1), ("Oxide", 1), ("Oxide", 2)]
    assert lib.list_problems("stacks") == []
    assert lib.load("stacks", "OXIDE") == lib.load("stacks", "Oxide", 2) == text
    res = lib.save("stacks", "oxide", text, user="fourth")
    assert (res.name, res.version) == ("Oxide", 3)
    res = lib.save("stacks", "OXIDE", text, user="fifth")     # typed exactly as stored: joins that form
    assert (res.name, res.version) == ("OXIDE", 4)
    after = _tree(lib.root / "stacks")
    assert all(after[k] == v for k, v in before.items() if k not in (".lock", ".changed"))   # nothing rewritten


# ---------------------------------------------------------------------- file permissions
@pytest.mark.parametrize("umask, mode", [(0o022, 0o644), (0o002, 0o664), (0o077, 0o600)])
def test_files_take_their_mode_from_the_umask(lib, umask, mode):
    old = os.umask(umask)
    try:
        lib.save("stacks", "Shared read", _preset(STACK_PRESETS[0]), user="a")
    finally:
        os.umask(old)
    folder = lib.root / "stacks"
    for fn in ("Shared read.json", "Shared read.json.meta.json"):
        assert (folder / fn).stat().st_mode & 0o777 == mode, fn
    assert _leftovers(lib.root) == []


def test_a_temporary_name_that_exists_is_never_opened(lib, monkeypatch):
    folder = lib.root / "stacks"
    folder.mkdir(parents=True)
    squatter = folder / ".tmp-aaaaaaaaaaaaaaaa.part"
    squatter.write_bytes(b"someone else's")
    tokens = iter(["aaaaaaaaaaaaaaaa", "bbbbbbbbbbbbbbbb", "cccccccccccccccc", "dddddddddddddddd"])
    monkeypatch.setattr(store.secrets, "token_hex", lambda n: next(tokens) if n == 8 else "e" * (2 * n))
    lib.save("stacks", "S", _preset(STACK_PRESETS[0]), user="a")
    assert squatter.read_bytes() == b"someone else's"
    assert lib.load("stacks", "S") == _preset(STACK_PRESETS[0])


# ---------------------------------------------------------------------- change marker and missing items
def test_change_marker_changes_with_every_save_and_archive_only(lib):
    empty = lib.change_marker("stacks")                  # no folder yet: still a value, no error
    assert lib.change_marker("stacks") == empty
    text = _preset(STACK_PRESETS[0])
    lib.save("stacks", "A", text, user="a")
    m1 = lib.change_marker("stacks")
    assert m1 != empty
    lib.list("stacks"), lib.load("stacks", "A")         # reading changes nothing
    assert lib.change_marker("stacks") == m1
    lib.save("stacks", "A", text, user="b")
    m2 = lib.change_marker("stacks")
    lib.archive("stacks", "A", 1)
    m3 = lib.change_marker("stacks")
    assert len({m1, m2, m3}) == 3
    lib.save("gratings", "G", _preset(GRATING_PRESETS[0]), user="g")    # another kind's folder
    assert lib.change_marker("stacks") == m3
    assert lib.list_problems("stacks") == []            # the marker file is not an item


def test_change_marker_sees_files_added_by_hand(lib):
    lib.save("stacks", "A", _preset(STACK_PRESETS[0]), user="a")
    before = lib.change_marker("stacks")
    (lib.root / "stacks" / "copied in.json").write_text("{}")
    assert lib.change_marker("stacks") != before


def test_missing_items_raise_item_missing(lib):
    lib.save("stacks", "A", _preset(STACK_PRESETS[0]), user="a")
    lib.archive("stacks", "A", 1)
    for call in (lambda: lib.load("stacks", "A"), lambda: lib.load("stacks", "A", 1),
                 lambda: lib.archive("stacks", "A", 1), lambda: lib.load("stacks", "Never saved")):
        with pytest.raises(store.ItemMissing):
            call()


# ---------------------------------------------------------------------- notes
def test_a_note_is_kept_in_the_signed_metadata_and_listed(lib):
    text = _preset(STACK_PRESETS[0])
    lib.save("stacks", "Gate oxide", text, user="ak", note="Line 3 monitor,\nafter the furnace service")
    lib.save("stacks", "Gate oxide", text, user="bz")
    entries = sorted(lib.list("stacks"), key=lambda e: e.version)
    assert [e.note for e in entries] == ["Line 3 monitor, after the furnace service", ""]
    meta_path = lib.root / "stacks" / (entries[0].file_name + ".meta.json")
    meta = json.loads(meta_path.read_text())
    assert meta["note"] == entries[0].note
    meta["note"] = "edited by hand"                       # the note is signed: an edited one is not trusted
    meta_path.write_text(json.dumps(meta))
    assert [e.version for e in lib.list("stacks")] == [2]
    assert "not written by this server" in str(lib.list_with_problems("stacks")[1][0])


def test_a_note_over_its_bound_is_refused_not_cut(lib):
    with pytest.raises(InputError, match=f"at most {store.MAX_NOTE_CHARS}"):
        lib.save("stacks", "Gate oxide", _preset(STACK_PRESETS[0]), user="ak", note="x" * (store.MAX_NOTE_CHARS + 1))
    assert lib.list("stacks") == []
    assert store.clean_note("  two\twords\x00 ") == "two words"
