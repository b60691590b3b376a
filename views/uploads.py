"""File drop zones that keep an upload within its size cap in the browser and on the server.

Every upload of the page (stack files, lamp and measured spectra, photos) comes through
:class:`CappedDropper`. The browser checks the size before sending anything and then sends the
file in chunks of ``UPLOAD_CHUNK_BYTES``, so no single websocket message is large. The server
counts the chunks as they arrive and drops a file the moment it passes its cap, so a client that
skips the browser's check still cannot make the server hold more than the cap. Once a file has
been handed over, the drop zone lets go of its bytes: a page keeps the parsed result, not the
upload.
"""
from __future__ import annotations

from typing import Callable

import panel as pn
import param

from .limits import UPLOAD_CHUNK_BYTES, upload_cap_bytes

__all__ = ["CappedDropper", "COMPACT", "browser_size_text"]

#: Keyword arguments for a one-line drop zone in a sidebar (a text file: a stack, a spectrum).
COMPACT = dict(layout="compact", width=300, height=40, margin=(2, 5), stylesheets=["""
    .bk-input.filepond--root { margin: 0; font-size: 13px; background-color: #fff !important;
                               border: 1px dashed #8a8a8a !important; border-radius: 4px; }
    .filepond--drop-label { min-height: 38px !important; }
    .filepond--drop-label label { padding: 0.2em 0.5em !important; }
    .filepond--panel-root { background-color: transparent !important; }
"""])


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
        elif name == self._dropped:
            return None                               # the rest of a file already refused: said once
        elif name not in self._file_buffer or len(self._file_buffer[name]) != chunk - 1:
            return self._refuse(name, f"{self._what} arrived out of order; please drop it again.")
        got = self._received.get(name, 0) + len(piece)
        if got > self.cap_bytes:
            mb = self.cap_bytes / 2**20
            return self._refuse(name, f"{name} is larger than this server accepts for it ({mb:.1f} MB); "
                                      "nothing of it was kept.")
        self._received[name] = got
        if chunk == total:
            self._received.pop(name, None)
        return super()._process_event(event)

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
