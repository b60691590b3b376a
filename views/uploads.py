"""File drop zones that keep an upload within its size cap in the browser and on the server.

Every upload of the page (stack files, lamp and measured spectra, photos) comes through
:class:`CappedDropper`. The browser checks the size before sending anything and then sends the
file in chunks of ``UPLOAD_CHUNK_BYTES``, so no single websocket message is large. The server
counts the chunks as they arrive and drops a file the moment it passes its cap, so a client that
skips the browser's check still cannot make the server hold more than the cap. Once a file has
been handed over, the drop zone lets go of its bytes: a page keeps the parsed result, not the
upload.

Reading a file happens off the event loop: each drop zone's handler gives the bytes to an
:class:`UploadReader`, which parses them in a worker thread while the message beside the zone says
"Reading <name> …", then applies the result (or shows why the file was refused) on the page's next
tick. Every parser bounds its rows and its time, so a worker thread is never held for long.

Sizes: 1 MB is 10**6 bytes (:data:`MB`) in every cap and message here, as the browser's drop zone
counts them.
"""
from __future__ import annotations

import html
import logging
import threading
import time
from functools import partial
from typing import Callable

import panel as pn
import param

from physics import InputError

from .limits import (MB, JobCancelled, UPLOAD_CHUNK_BYTES, interactive_executor, logged_job, post_to_page,  # noqa: F401
                     served, session_key, size_text, upload_cap_bytes, upload_refusal)

__all__ = ["CappedDropper", "COMPACT", "MB", "UploadReader", "browser_size_text", "size_text", "too_large"]

log = logging.getLogger("fringegauge")

#: Shortest time between two "Reading <name> … n lines" updates of one drop zone (s): each is a message.
PROGRESS_EVERY_S = 0.3

#: Keyword arguments for a one-line drop zone in a sidebar (a text file: a stack, a spectrum).
COMPACT = dict(layout="compact", width=300, height=40, margin=(2, 5), stylesheets=["""
    .bk-input.filepond--root { margin: 0; font-size: 13px; background-color: #fff !important;
                               border: 1px dashed #8a8a8a !important; border-radius: 4px; }
    .filepond--drop-label { min-height: 38px !important; }
    .filepond--drop-label label { padding: 0.2em 0.5em !important; }
    .filepond--panel-root { background-color: transparent !important; }
"""])


#: The refusal of an upload over its cap (one sentence, sizes in MB of 10**6 bytes).
too_large = upload_refusal


def browser_size_text(cap_bytes: int) -> str:
    """The drop zone's own size limit as its browser side reads it (kB of 1000 bytes), never above ``cap_bytes``."""
    return f"{max(1, int(cap_bytes) // 1000)}KB"


class CappedDropper(pn.widgets.FileDropper):
    """One file at a time, at most ``cap_bytes``, handed to ``on_file(name, data)`` as bytes.

    ``kind_cap_bytes`` is the cap for this kind of file; the server's ``--max-upload-mb`` may lower
    it (see :func:`views.limits.upload_cap_bytes`). A file that is too large, or an upload that
    arrives out of order, is dropped and ``on_refused(message)`` says why.
    """

    cap_bytes = param.Integer(default=UPLOAD_CHUNK_BYTES, bounds=(1, None), constant=True, doc="""
        Largest file taken, in bytes.""")

    _rename = {**pn.widgets.FileDropper._rename, "cap_bytes": None}     # the server's own; never sent

    def __init__(self, kind_cap_bytes: int, on_file: Callable[[str, bytes], object],
                 on_refused: Callable[[str], object], what: str = "The file", **params):
        cap = upload_cap_bytes(kind_cap_bytes)
        params.setdefault("chunk_size", UPLOAD_CHUNK_BYTES)
        params.setdefault("multiple", False)
        params.setdefault("previews", [])
        # The file kinds are checked here, by extension, with a sentence beside the zone: the browser's own
        # check words a refusal from MIME types ("Expects  or application/json") and leaves the message of
        # the previous file standing beneath it.
        self.extensions = tuple(t.lower() for t in params.pop("accepted_filetypes", []) if t.startswith("."))
        super().__init__(cap_bytes=cap, max_file_size=browser_size_text(cap), **params)
        self._on_file, self._on_refused, self._what = on_file, on_refused, what
        self._received: dict[str, int] = {}
        self._dropped: str | None = None              # the file being refused, whose later chunks are ignored
        self.param.watch(self._hand_over, "value")

    # ------------------------------------------------------------------ server side of the upload
    def _process_event(self, event):
        if event.event_name != "upload_event":
            return super()._process_event(event)
        data = event.data if isinstance(event.data, dict) else {}
        name, chunk, total, piece = (data.get(k) for k in ("name", "chunk", "total_chunks", "data"))
        if not (isinstance(name, str) and name and isinstance(chunk, int) and isinstance(total, int)
                and 1 <= chunk <= total and isinstance(piece, bytes) and isinstance(data.get("type"), str)):
            return self._refuse(name, f"{self._what} arrived garbled; please drop it again.")
        if chunk == 1:
            self._file_buffer.clear()                 # one file at a time: a new file drops an unfinished one
            self._received.clear()
            self._dropped = None
            if self.extensions and not name.lower().endswith(self.extensions):
                return self._refuse(name, self.kind_refusal(name))
        elif name == self._dropped:
            return None                               # the rest of a file already refused: said once
        elif name not in self._file_buffer or len(self._file_buffer[name]) != chunk - 1:
            return self._refuse(name, f"{self._what} arrived out of order; please drop it again.")
        got = self._received.get(name, 0) + len(piece)
        if got > self.cap_bytes:
            return self._refuse(name, f"{name} is larger than this server accepts for it "
                                      f"({size_text(self.cap_bytes)}); nothing of it was kept.")
        self._received[name] = got
        if chunk == total:
            self._received.pop(name, None)
        return super()._process_event(event)

    def kind_refusal(self, name: str) -> str:
        """Why a file of another kind is refused, naming the extensions this zone takes."""
        kinds = [e for e in self.extensions]
        listed = kinds[0] if len(kinds) == 1 else ", ".join(kinds[:-1]) + " or " + kinds[-1]
        base = name.replace("\\", "/").rsplit("/", 1)[-1][:100]
        return f"{base} was not read: {self._what[0].lower() + self._what[1:]} must be a {listed} file."

    def _refuse(self, name, message: str):
        self._file_buffer.clear()
        self._received.clear()
        self._dropped = name
        self._on_refused(message)

    def _hand_over(self, event):
        files = event.new or {}
        if not files:
            return                                    # a file removed in the browser
        name, data = next(iter(files.items()))
        self.value.clear()                            # let go of the upload's bytes (the browser is not told)
        self.mime_type.clear()
        self._on_file(name, data.encode("utf-8") if isinstance(data, str) else bytes(data))

    def receive(self, name: str, data: bytes, mime: str = "application/octet-stream"):
        """Feed a whole file through the same path as the browser's chunks (for scripts and tests)."""
        from types import SimpleNamespace

        step = max(1, self.chunk_size or UPLOAD_CHUNK_BYTES)
        total = max(1, -(-len(data) // step))
        for i in range(total):
            self._process_event(SimpleNamespace(event_name="upload_event", data=dict(
                name=name, chunk=i + 1, total_chunks=total, data=bytes(data[i * step:(i + 1) * step]), type=mime)))


class UploadReader:
    """Reads the files of one drop zone: in a worker thread when the page is served, at once otherwise.

    ``field`` is the drop zone's message field (``field.message``, the pane beside the zone, and
    ``field.show_error(text)``). :meth:`take` is the whole path of an upload: a file over its cap is
    refused at once; otherwise ``parse(data, progress)`` (the bytes to a result; ``progress(lines)`` may be
    called now and then) runs in a :func:`views.limits.interactive_executor` thread while the pane says
    "Reading <name> …" and how many lines are read. Then, on the page's next tick
    (:func:`views.limits.post_to_page`, the document lock held), ``apply(result)`` runs, or the field shows
    "<name>: <why>" for a file the parser refused (``physics.InputError``). A newer file for the same zone
    supersedes one still being read: the older reading stops at its next progress call, and its result,
    should it finish anyway, is dropped. So does a page that has gone. An unexpected error is logged and
    the page says the file could not be read.

    Outside a server (scripts, tests) ``parse`` and ``apply`` run at once and :meth:`take` returns what
    ``apply`` returned (False for a refused file); an unexpected error propagates.
    """

    def __init__(self, field, kind: str = "upload"):
        self.field = field
        self.message = field.message
        self.kind = kind                              # how the server log names these readings
        self._job = 0
        self._lock = threading.Lock()
        self._pending = None                          # name of the file being read (served pages only)

    def take(self, name: str, data: bytes, kind_cap_bytes: int, parse: Callable[[bytes, Callable], object],
             apply: Callable[[object], object], advice: str = ""):
        """Read an uploaded file ``data`` named ``name`` of a kind capped at ``kind_cap_bytes`` (see
        :func:`too_large`; ``advice`` ends its refusal). When served, returns True once reading has started."""
        refusal = too_large(name, len(data), kind_cap_bytes, advice)
        if refusal:
            return self.refuse(refusal)
        data = bytes(data)
        return self.read(name, partial(parse, data), apply, partial(self._refused, name), size=len(data))

    def refuse(self, message: str) -> bool:
        """Say why the newest file was refused (the drop zone's ``on_refused``); one still being read is dropped."""
        self.cancel()
        self.field.show_error(message)
        return False

    def _refused(self, name: str, message: str) -> bool:
        self.field.show_error(f"{name}: {message}")
        return False

    @property
    def reading(self) -> bool:
        """True while a file handed over is still being read (served pages only)."""
        return self._pending is not None

    def read(self, name: str, parse: Callable[[Callable[[int], None]], object], apply: Callable[[object], object],
             fail: Callable[[str], object], size: int = 0):
        """:meth:`take` without the size check: ``parse(progress)``, then ``apply(result)`` or ``fail(why)``.

        Each reading is logged as one line (:func:`views.limits.logged_job`: kind, ``size``, duration,
        outcome), never with the file's name or content."""
        with self._lock:
            self._job += 1
            job = self._job
        doc = pn.state.curdoc
        session = session_key(self)
        if not served(doc):
            self._pending = None
            try:
                with logged_job(f"read_{self.kind}", size, session):
                    result = parse(lambda lines: None)
            except InputError as exc:
                fail(str(exc))
                return False
            return apply(result)
        self._pending = name
        self._show(job, name, 0)
        last = [time.monotonic()]

        def progress(lines: int):
            if job != self._job or not served(doc):
                raise JobCancelled                    # superseded by a newer file, or the page has gone
            now = time.monotonic()
            if now - last[0] >= PROGRESS_EVERY_S:
                last[0] = now
                post_to_page(doc, partial(self._show, job, name, lines))

        def work():
            try:
                with logged_job(f"read_{self.kind}", size, session):
                    outcome = apply, parse(progress)
            except JobCancelled:
                return
            except InputError as exc:
                outcome = fail, str(exc)
            except MemoryError:
                outcome = fail, ("The server does not have enough memory free to read it now; try again in a "
                                 "moment, or with a smaller file.")
            except Exception:  # never lose the page to one bad file
                log.exception("reading an upload failed")
                outcome = fail, "It could not be read because of an unexpected error (logged on the server)."
            post_to_page(doc, partial(self._finish, job, *outcome))
        interactive_executor().submit(work)
        return True

    def cancel(self) -> None:
        """Drop the file being read, if any (something newer replaced what it would change)."""
        with self._lock:
            self._job += 1
        if self._pending is not None:
            self._pending = None
            self.message.object = ""
            self.message.visible = False

    def _show(self, job: int, name: str, lines: int):
        if job != self._job:
            return
        so_far = f" ({lines:,} lines so far)" if lines else ""
        self.message.object = (f'<div class="fg-upload-reading" role="status" style="font-size:12px;color:#555">'
                               f"Reading {html.escape(name)} …{so_far}</div>")
        self.message.visible = True

    def _finish(self, job: int, fn, value):
        if job != self._job:
            return                                    # a newer file took this zone meanwhile
        self._pending = None
        self.message.object = ""
        self.message.visible = False
        try:
            fn(value)
        except Exception:  # never lose the page to one bad file
            log.exception("using an upload failed")
            self.field.show_error("The file could not be used because of an unexpected error (logged on the "
                                  "server); the page keeps what it showed.")
