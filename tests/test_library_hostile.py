"""The lab library against a hostile folder and forged "who saved": special files, links, huge files,
hand-made or edited metadata, a key in the wrong place, a deleted or unmounted folder.

Every library call that a special file could block runs in a thread with a time bound
(``HANG_BOUND_S``), so a regression fails here instead of hanging the suite.
"""

from __future__ import annotations

import contextlib
import errno
import hashlib
import json
import os
import re
import shutil
import socket
import subprocess
import sys
import threading
import time
from pathlib import Path

import pytest

import library.store as store
from library.store import InputError, Library, LibraryWriteError

ROOT = Path(__file__).resolve().parent.parent
STACK = (ROOT / "presets" / "thermal_oxide_on_silicon.json").read_text(encoding="utf-8")
CALIBRATION = json.dumps({"name": "Wafer 7 corner", "box": [10, 20, 110, 220], "reference": "substrate"})
#: How long a library call may take before it counts as hung (a protection bound, not a timing: the calls
#: take milliseconds; a blocked open would take forever).
HANG_BOUND_S = 10
KEY_ENV = "FRINGEGAUGE_LIBRARY_KEY_FILE"


@pytest.fixture(autouse=True, scope="module")
def _key_file(tmp_path_factory):
    """Every library here signs with a key in a temporary folder, never one in the home folder."""
    with pytest.MonkeyPatch.context() as mp:
        mp.setenv(KEY_ENV, str(tmp_path_factory.mktemp("key") / "library.key"))
        yield


@pytest.fixture
def lab(tmp_path):
    """(library, root, outside): a library with one saved stack "A" and a folder outside it."""
    root, outside = tmp_path / "lab", tmp_path / "outside"
    outside.mkdir()
    lib = Library(root)
    lib.save("stacks", "A", STACK, user="ak")
    return lib, root, outside


def bounded(fn, *args, fifos=(), **kwargs):
    """``fn(*args, **kwargs)`` run in a thread; fails the test when it has not returned in HANG_BOUND_S.

    ``fifos``: pipes a hung call may be waiting on; they are opened for writing afterwards, which
    releases the waiting thread, so a regression does not leave a thread behind.
    """
    box = {}

    def run():
        try:
            box["value"] = fn(*args, **kwargs)
        except BaseException as exc:          # re-raised in the test's thread
            box["error"] = exc

    thread = threading.Thread(target=run, daemon=True)
    thread.start()
    thread.join(HANG_BOUND_S)
    if thread.is_alive():
        for fifo in fifos:
            with contextlib.suppress(OSError):
                os.close(os.open(fifo, os.O_WRONLY | os.O_NONBLOCK))
        thread.join(5)
        pytest.fail(f"{getattr(fn, '__name__', fn)} did not return within {HANG_BOUND_S} s (blocked on a special file)")
    if "error" in box:
        raise box["error"]
    return box["value"]


def problems(lib, kind="stacks") -> dict:
    return {p.file_name: p.message for p in bounded(lib.list_problems, kind)}


def assert_refused(lib, file_name: str, words: str, listed=()) -> None:
    """``file_name`` of the stacks is not listed (only ``listed`` are), is reported with ``words``, and its
    load is refused with them."""
    assert [e.name for e in lib.list("stacks")] == list(listed)
    assert words in problems(lib)[file_name]
    with pytest.raises(InputError, match=re.escape(words)):
        lib.load("stacks", file_name[:-len(".json")])


def bytes_read() -> int:
    """Bytes this process has read through read() calls so far (Linux /proc/self/io)."""
    for line in Path("/proc/self/io").read_text().splitlines():
        if line.startswith("rchar:"):
            return int(line.split()[1])
    raise AssertionError("no rchar in /proc/self/io")


def outside_files(outside: Path) -> list:
    return sorted(str(p.relative_to(outside)) for p in outside.rglob("*"))


# ---------------------------------------------------------------------- special files
def test_a_pipe_as_the_change_token_blocks_nothing(lab):
    lib, root, _ = lab
    token = root / "stacks" / ".changed"
    token.unlink()
    os.mkfifo(token)
    marker = bounded(lib.change_marker, "stacks", fifos=[token])
    assert marker[1] == b""                                      # not read, and no wait for a writer
    assert "not a regular file" in problems(lib)[".changed"]
    assert bounded(lib.save, "stacks", "B", STACK, user="bz", fifos=[token]).version == 1
    assert token.is_file() and not token.is_fifo()               # the save replaced it with a token
    assert bounded(lib.change_marker, "stacks") != marker


@pytest.mark.parametrize("what", ["sidecar", "data"])
def test_a_pipe_as_a_library_file_is_refused_at_once(lab, what):
    lib, root, _ = lab
    target = root / "stacks" / ("A.json.meta.json" if what == "sidecar" else "A.json")
    target.unlink()
    os.mkfifo(target)
    bounded(assert_refused, lib, "A.json", "metadata file is not a regular file" if what == "sidecar"
            else "not a regular file", fifos=[target])


def test_a_socket_is_refused(lab):
    lib, root, _ = lab
    path = root / "stacks" / "Sock.json"
    with socket.socket(socket.AF_UNIX) as s:
        s.bind(str(path))
        assert "not a regular file" in problems(lib)["Sock.json"]


@pytest.mark.parametrize("what", ["sidecar", "data"])
def test_a_sparse_2_gb_file_is_never_read(lab, what):
    lib, root, _ = lab
    target = root / "stacks" / ("A.json.meta.json" if what == "sidecar" else "A.json")
    with open(target, "r+b") as f:
        f.truncate(2 * 1024**3)                # 2 GB that take no disk: reading it would cost 2 GB of memory
    before = bytes_read()
    assert bounded(lib.list, "stacks") == []
    message = problems(lib)["A.json"]
    with pytest.raises(InputError) as refused:
        bounded(lib.load, "stacks", "A")
    read = bytes_read() - before
    assert read < 2_000_000, f"{read:,} bytes read for three calls"
    assert "larger than" in message and ("16 KB" if what == "sidecar" else "1 MB") in message
    assert "larger than" in str(refused.value)


def test_a_sidecar_that_grows_after_its_lstat_is_read_only_to_its_cap(lab, monkeypatch):
    lib, root, _ = lab
    sidecar = root / "stacks" / "A.json.meta.json"
    real_fstat = os.fstat

    def grow_then_fstat(fd):                   # the file grows between the checks and the read
        st = real_fstat(fd)
        if st.st_size < store.MAX_META_BYTES and os.readlink(f"/proc/self/fd/{fd}").endswith(".meta.json"):
            with open(sidecar, "ab") as f:
                f.write(b" " * (3 * store.MAX_META_BYTES))
        return st
    monkeypatch.setattr(os, "fstat", grow_then_fstat)
    before = bytes_read()
    assert lib.list("stacks") == []
    monkeypatch.undo()
    assert bytes_read() - before < 4 * store.MAX_META_BYTES
    assert "larger than 16 KB" in problems(lib)["A.json"]


def test_a_file_name_that_would_read_as_another_is_shown_escaped(lab):
    lib, root, _ = lab
    (root / "stacks" / "nosj.\u202eA.json").write_text("{}")        # a right-to-left mark: reads as "A.json"
    [problem] = [p for p in lib.list_problems("stacks") if "\u202e" in p.file_name]
    assert str(problem).startswith("nosj.\\u202eA.json: ")


# ---------------------------------------------------------------------- links are never followed
def test_a_linked_lock_file_makes_a_save_refuse_and_create_nothing_outside(lab):
    lib, root, outside = lab
    lock = root / "stacks" / ".lock"
    lock.unlink()
    os.symlink(outside / "created-by-the-save", lock)             # a dangling link: O_CREAT would create it
    with pytest.raises(LibraryWriteError, match="lock file .* is a link"):
        bounded(lib.save, "stacks", "B", STACK, user="bz")
    with pytest.raises(LibraryWriteError, match="lock file .* is a link"):
        bounded(lib.archive, "stacks", "A", 1)
    assert outside_files(outside) == []
    assert "lock file is a link" in problems(lib)[".lock"]
    assert [e.name for e in lib.list("stacks")] == ["A"]            # reading still works


def test_a_lock_file_linked_to_an_existing_file_leaves_it_alone(lab):
    lib, root, outside = lab
    victim = outside / "victim.txt"
    victim.write_text("keep")
    before = victim.stat()
    lock = root / "stacks" / ".lock"
    lock.unlink()
    os.symlink(victim, lock)
    with pytest.raises(LibraryWriteError):
        lib.save("stacks", "B", STACK, user="bz")
    after = victim.stat()
    assert victim.read_text() == "keep" and (after.st_size, after.st_mtime_ns) == (before.st_size, before.st_mtime_ns)


def test_a_linked_data_file_is_refused_even_when_it_points_inside_the_library(lab):
    lib, root, _ = lab
    elsewhere = root / "elsewhere"
    elsewhere.mkdir()
    os.rename(root / "stacks" / "A.json", elsewhere / "A.json")
    os.symlink(elsewhere / "A.json", root / "stacks" / "A.json")   # same bytes, signed sidecar: only the link is wrong
    assert_refused(lib, "A.json", "is a link")


def test_a_linked_sidecar_is_refused(lab):
    lib, root, _ = lab
    elsewhere = root / "elsewhere"
    elsewhere.mkdir()
    os.rename(root / "stacks" / "A.json.meta.json", elsewhere / "meta")
    os.symlink(elsewhere / "meta", root / "stacks" / "A.json.meta.json")
    assert_refused(lib, "A.json", "metadata file is a link")


@pytest.mark.parametrize("where", ["inside", "outside"])
def test_a_linked_kind_folder_is_neither_listed_nor_written(lab, where):
    lib, root, outside = lab
    real = (root / "real-stacks") if where == "inside" else (outside / "stacks")
    os.rename(root / "stacks", real)
    os.symlink(real, root / "stacks")
    before = sorted(p.name for p in real.iterdir())
    assert bounded(lib.list, "stacks") == []
    assert "stacks folder is a link" in problems(lib)["stacks"]
    with pytest.raises(LibraryWriteError, match="stacks folder is a link"):
        lib.save("stacks", "B", STACK, user="bz")
    with pytest.raises(InputError, match="is a link"):
        lib.load("stacks", "A")
    with pytest.raises(LibraryWriteError, match="is a link"):
        lib.archive("stacks", "A", 1)
    assert sorted(p.name for p in real.iterdir()) == before        # nothing written through the link
    assert lib.change_marker("stacks")[1] == b""


def test_a_linked_archive_folder_is_reported_and_archives_nothing_outside(lab):
    lib, root, outside = lab
    os.symlink(outside, root / "stacks" / ".archive")
    with pytest.raises(LibraryWriteError, match="archive folder .* is a link"):
        lib.archive("stacks", "A", 1)
    assert outside_files(outside) == []
    assert "archive folder is a link" in problems(lib)[".archive"]
    assert [e.name for e in lib.list("stacks")] == ["A"]


def test_a_root_that_is_a_link_made_by_the_administrator_is_used(tmp_path):
    share = tmp_path / "share"
    store.prepare_root(share)
    (tmp_path / "lab").symlink_to(share)
    lib = Library(tmp_path / "lab")
    lib.save("stacks", "A", STACK, user="ak")
    assert lib.load("stacks", "A") == STACK and (share / "stacks" / "A.json").is_file()


# ---------------------------------------------------------------------- the listing's cost is bounded
def test_the_listing_looks_at_a_bounded_number_of_entries_and_says_so(lab, monkeypatch):
    lib, root, _ = lab
    monkeypatch.setattr(store, "MAX_SCAN_ENTRIES", 50)
    for i in range(300):
        (root / "stacks" / f"junk {i}.txt").write_text("x")
    found = problems(lib)
    note = found.pop("stacks")
    assert "more than 50 files" in note and "only 50" in note
    assert len(found) <= 50


# ---------------------------------------------------------------------- forged "who saved"
def _hand_made(root: Path, name: str, data: str, **fields):
    """A data file and a sidecar written by hand with the right size and sha256."""
    raw = data.encode("utf-8")
    meta = {"format": "fringegauge-library-meta", "version": 2, "kind": "stacks", "name": name, "file_version": 1,
            "user": "mallory", "user_verified": True, "saved_at": "2026-01-01T00:00:00.000+00:00",
            "size": len(raw), "sha256": hashlib.sha256(raw).hexdigest(), **fields}
    (root / "stacks" / f"{name}.json").write_bytes(raw)
    (root / "stacks" / f"{name}.json.meta.json").write_text(json.dumps(meta))


@pytest.mark.parametrize("form", ["no hmac", "wrong hmac", "old format"])
def test_hand_made_metadata_with_the_right_checksum_is_refused(lab, form):
    lib, root, _ = lab
    fields = {"no hmac": {}, "wrong hmac": {"hmac": "0" * 64}, "old format": {"version": 1}}[form]
    _hand_made(root, "Forged", STACK, **fields)
    assert_refused(lib, "Forged.json", "not written by this server (hand-made or edited metadata)"
                   if form == "wrong hmac" else "no signature from this server", listed=["A"])


@pytest.mark.parametrize("field, value", [("user", "someone else"), ("user_verified", True),
                                          ("saved_at", "2020-01-01T00:00:00.000+00:00"), ("extra", 1)])
def test_an_edited_sidecar_is_refused(lab, field, value):
    lib, root, _ = lab
    path = root / "stacks" / "A.json.meta.json"
    meta = json.loads(path.read_text())
    meta[field] = value
    path.write_text(json.dumps(meta))
    assert_refused(lib, "A.json", "not written by this server")


def test_a_file_signed_with_another_key_is_refused(lab):
    lib, root, _ = lab
    other = Library(root, key=os.urandom(32))
    other.save("stacks", "Elsewhere", STACK, user="ak")
    assert [e.name for e in other.list("stacks")] == ["Elsewhere"]    # valid for the key that signed it
    assert [e.name for e in lib.list("stacks")] == ["A"]
    assert "not written by this server" in problems(lib)["Elsewhere.json"]


def test_the_verified_flag_is_recorded_and_shown(lab):
    lib, _, _ = lab
    lib.save("stacks", "B", STACK, user="alice", user_verified=True)
    by = {e.name: e for e in lib.list("stacks")}
    assert (by["B"].user_verified, by["B"].saved_by) == (True, "alice")
    assert (by["A"].user_verified, by["A"].saved_by) == (False, "ak (typed name)")
    res = lib.save("stacks", "B", STACK, user="bz")
    assert "(saved by alice on " in res.message


# ---------------------------------------------------------------------- the key
def test_the_key_is_created_private_once_and_read_back(tmp_path):
    path = tmp_path / "conf" / "library.key"
    key = store.load_or_create_key(path)
    assert len(key) == 32 and path.stat().st_mode & 0o777 == 0o600
    assert store.load_or_create_key(path) == key
    assert path.read_text().strip() == key.hex()


def test_the_key_follows_the_environment(tmp_path, monkeypatch):
    monkeypatch.setenv(KEY_ENV, str(tmp_path / "k"))
    assert store.key_file_path() == tmp_path / "k"
    monkeypatch.delenv(KEY_ENV)
    monkeypatch.setenv("HOME", str(tmp_path / "home"))
    assert store.key_file_path() == tmp_path / "home" / ".config" / "fringegauge" / "library.key"


def test_a_key_file_inside_the_library_is_refused(tmp_path, monkeypatch):
    root = tmp_path / "lab"
    store.prepare_root(root)
    inside = root / "library.key"
    with pytest.raises(store.LibraryKeyError, match="inside the lab library folder.*forge"):
        store.load_or_create_key(inside, library_root=root)
    assert not inside.exists()
    monkeypatch.setenv(KEY_ENV, str(inside))
    lib = Library(root)
    with pytest.raises(store.LibraryKeyError, match="cannot check or sign") as info:
        lib.save("stacks", "A", STACK, user="ak")
    assert str(tmp_path) not in str(info.value)
    assert not inside.exists() and not (root / "stacks").exists()


def test_a_linked_or_shared_key_file_is_refused(tmp_path):
    target = tmp_path / "target.key"
    link = tmp_path / "link.key"
    link.symlink_to(target)                                        # dangling: O_EXCL|O_NOFOLLOW creates nothing
    with pytest.raises(store.LibraryKeyError, match="link"):
        store.load_or_create_key(link)
    assert not target.exists()
    open_key = tmp_path / "open.key"
    store.load_or_create_key(open_key)
    open_key.chmod(0o644)
    with pytest.raises(store.LibraryKeyError, match="other accounts.*chmod 600"):
        store.load_or_create_key(open_key)
    (tmp_path / "bad.key").write_text("not a key\n")
    (tmp_path / "bad.key").chmod(0o600)
    with pytest.raises(store.LibraryKeyError, match="not a key"):
        store.load_or_create_key(tmp_path / "bad.key")


# ---------------------------------------------------------------------- accepting files saved before the signature
def _old_format(root: Path, name: str, data: str, user="ann"):
    """A file and sidecar as versions before the signature wrote them."""
    raw = data.encode("utf-8")
    meta = {"format": "fringegauge-library-meta", "version": 1, "kind": "stacks", "name": name, "file_version": 1,
            "user": user, "saved_at": "2025-06-01T08:00:00.000+00:00", "size": len(raw),
            "sha256": hashlib.sha256(raw).hexdigest()}
    (root / "stacks" / f"{name}.json").write_bytes(raw)
    (root / "stacks" / f"{name}.json.meta.json").write_text(json.dumps(meta, indent=2) + "\n")


def _sign(*args):
    env = {**os.environ, "PYTHONPATH": str(ROOT)}
    return subprocess.run([sys.executable, "-m", "library", *args], cwd=ROOT, env=env, capture_output=True,
                          text=True, timeout=120)


def test_the_sign_command_accepts_old_files_whose_checksum_matches(lab):
    lib, root, _ = lab
    _old_format(root, "Old", STACK)
    _old_format(root, "Old edited", STACK)
    edited = root / "stacks" / "Old edited.json"
    edited.write_text(STACK.replace("Thermal", "Warm"))
    assert "no signature from this server" in problems(lib)["Old.json"]
    key_file = os.environ[KEY_ENV]
    dry = _sign("sign", str(root), "--kind", "stacks", "--key-file", key_file, "--dry-run")
    assert dry.returncode == 0, dry.stderr
    assert "stacks/Old.json: would be signed" in dry.stdout
    assert "Old.json" in problems(lib)                              # a dry run changes nothing
    done = _sign("sign", str(root), "--kind", "stacks", "--key-file", key_file)
    assert done.returncode == 0, done.stderr
    assert "stacks/Old.json: signed" in done.stdout
    assert "Old edited.json: not signed: its checksum does not match" in done.stdout
    assert "1 file signed, 1 already signed" in done.stdout
    by = {e.name: e for e in lib.list("stacks")}
    assert set(by) == {"A", "Old"} and by["Old"].saved_by == "ann (typed name)"
    assert by["Old"].saved_at == "2025-06-01T08:00:00.000+00:00"
    assert lib.load("stacks", "Old") == STACK
    assert "no signature from this server" in problems(lib)["Old edited.json"]     # still refused


def test_the_sign_command_explains_itself():
    out = _sign("sign", "--help")
    assert out.returncode == 0 and "sha256" in out.stdout and "--key-file" in out.stdout and "--kind" in out.stdout
    assert _sign("sign", "/nonexistent/library/folder").returncode != 0


def test_the_sign_command_never_makes_a_key_of_its_own(lab, tmp_path):
    _, root, _ = lab
    missing = tmp_path / "no-such.key"
    out = _sign("sign", str(root), "--key-file", str(missing))
    assert out.returncode == 2 and "no library key file" in out.stderr and not missing.exists()


# ---------------------------------------------------------------------- the root, its marker, leftovers
def test_prepare_root_creates_and_marks_a_new_library(tmp_path):
    root = tmp_path / "new" / "lab"
    notes = store.prepare_root(root)
    assert (root / store.MARKER_NAME).is_file()
    assert any("created" in n for n in notes) and any("marker" in n for n in notes)
    assert store.prepare_root(root) == []                           # nothing to do the second time


def test_prepare_root_marks_an_older_library_and_refuses_a_foreign_folder(tmp_path):
    old = tmp_path / "old"
    (old / "stacks").mkdir(parents=True)
    assert any("before the marker" in n for n in store.prepare_root(old))
    foreign = tmp_path / "home"
    foreign.mkdir()
    (foreign / "thesis.tex").write_text("x")
    with pytest.raises(LibraryWriteError, match="not a lab library"):
        store.prepare_root(foreign)
    assert not (foreign / store.MARKER_NAME).exists()
    linked = tmp_path / "linked"
    linked.mkdir()
    (linked / store.MARKER_NAME).symlink_to(tmp_path / "nowhere")
    with pytest.raises(LibraryWriteError, match="is a link"):
        store.prepare_root(linked)


def test_prepare_root_removes_only_our_old_temporary_files(tmp_path):
    root = tmp_path / "lab"
    outside = tmp_path / "outside.part"
    outside.write_text("keep")
    store.prepare_root(root)
    folder = root / "stacks"
    folder.mkdir()
    hour_ago = time.time() - store.TMP_MAX_AGE_S - 60
    old, fresh, link, other = (folder / ".tmp-0123456789abcdef.part", folder / ".tmp-fedcba9876543210.part",
                               folder / ".tmp-1111111111111111.part", folder / "notes.part")
    for p in (old, fresh, other):
        p.write_text("x")
    link.symlink_to(outside)
    for p in (old, other):
        os.utime(p, (hour_ago, hour_ago))
    os.utime(link, (hour_ago, hour_ago), follow_symlinks=False)
    notes = store.prepare_root(root)
    assert notes == [f"removed 1 temporary file of interrupted saves from the stacks folder (lab library {root})"]
    assert not old.exists() and fresh.exists() and other.exists() and link.is_symlink()
    assert outside.read_text() == "keep"


def test_a_library_folder_deleted_after_start_is_not_recreated(tmp_path):
    root = tmp_path / "lab"
    store.prepare_root(root)
    lib = Library(root)
    lib.save("stacks", "A", STACK, user="ak")
    shutil.rmtree(root)
    for call in (lambda: lib.save("stacks", "A", STACK, user="ak"), lambda: lib.archive("stacks", "A", 1)):
        with pytest.raises(LibraryWriteError, match=r"folder is missing \(deleted or unmounted\?\); nothing was") as info:
            call()
        assert str(tmp_path) not in str(info.value)
    assert not root.exists()
    assert Library(root).root_problem().startswith("The lab library folder is missing")


def test_an_unmounted_share_showing_its_empty_mount_point_is_not_written(tmp_path):
    root = tmp_path / "mnt"
    lib = Library(root)
    lib.save("stacks", "A", STACK, user="ak")        # a process's first save prepares the root
    shutil.rmtree(root)
    root.mkdir()                                     # the share goes; its empty mount point stays
    with pytest.raises(LibraryWriteError, match="folder is missing"):
        lib.save("stacks", "B", STACK, user="ak")
    assert list(root.iterdir()) == []


def test_a_kind_folder_is_created_inside_a_marked_root(tmp_path):
    root = tmp_path / "lab"
    store.prepare_root(root)
    Library(root).save("gratings", "G", (ROOT / "presets" / "gratings").glob("*.json").__next__().read_text(),
                       user="ak")
    assert (root / "gratings").is_dir() and Library(root).root_problem() is None


# ---------------------------------------------------------------------- messages name no server path
def test_no_message_names_a_server_path(lab, monkeypatch):
    lib, root, outside = lab
    secret = str(root.parent)
    messages = []

    def full(*args, **kwargs):
        raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC), str(root / "stacks" / ".tmp-x.part"))
    monkeypatch.setattr(store, "_create_temp", full)
    with pytest.raises(LibraryWriteError) as info:
        lib.save("stacks", "A", STACK, user="ak")
    messages.append(str(info.value))

    def nameless(*args, **kwargs):
        raise OSError(f"failed at {root}")           # an OSError whose text is only a path
    monkeypatch.setattr(store, "_create_temp", nameless)
    with pytest.raises(LibraryWriteError) as info:
        lib.save("stacks", "A", STACK, user="ak")
    messages.append(str(info.value))
    monkeypatch.undo()
    (root / "stacks" / "bad.json").symlink_to(outside)
    os.mkfifo(root / "stacks" / "pipe.json")
    (root / "stacks" / "huge.json").write_bytes(b" " * (store.MAX_CONTENT_BYTES + 1))
    messages += [str(p) for p in lib.list_problems("stacks")]
    for call in (lambda: lib.load("stacks", "bad"), lambda: lib.load("stacks", "pipe"),
                 lambda: lib.load("stacks", "nothing")):
        with pytest.raises(InputError) as info:
            call()
        messages.append(str(info.value))
    messages.append(store.error_text(OSError(errno.EACCES, "Permission denied", str(root))))
    assert len(messages) >= 8
    for m in messages:
        assert secret not in m and "/" + root.name + "/" not in m, m
