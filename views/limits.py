"""Server-wide limits on heavy work, set by ``serve.py`` and read by the page.

``serve.py`` validates its command-line options and writes them to ``FRINGEGAUGE_*``
environment variables before Panel starts, so every session of the same process sees
the same values through :meth:`Limits.from_env`. Running ``panel serve app.py``
directly gives the defaults below.

Which code should consult each limit. Enforced so far: ``max_photo_megapixels`` and
``max_upload_mb`` for photos, and ``max_jobs_server`` for photo maps and spectrum fits
(:func:`heavy_job`, which also logs one line per heavy job); the rest is still to do.

``max_grid_points`` (``FRINGEGAUGE_MAX_GRID_POINTS``)
    ``views.explorer`` (``refresh``/``_compute`` for the thickness x angle map and strip),
    ``views.grating`` (the colour map) and ``views.inverse`` (the colour → thickness
    search): refuse or coarsen a request whose grid exceeds it, before it is queued.
``max_photo_megapixels`` (``FRINGEGAUGE_MAX_PHOTO_MEGAPIXELS``)
    ``views.inverse`` when a photo is dropped: check the decoded width x height
    (ideally from the header, before decoding pixels) and refuse larger images.
``max_upload_mb`` (``FRINGEGAUGE_MAX_UPLOAD_MB``)
    Every file drop/upload handler (``views.explorer`` stack/SPD files, ``views.fit``
    spectra, ``views.grating`` files, ``views.inverse`` photos): refuse larger payloads
    with a message. ``serve.py`` also raises the websocket message size to fit it.
``max_jobs_per_session`` (``FRINGEGAUGE_MAX_JOBS_PER_SESSION``)
    The ``_worker`` loops that submit to ``views.explorer.EXECUTOR`` (explorer, fit,
    grating, inverse): at most this many jobs of one session queued or running at once.
``max_jobs_server`` (``FRINGEGAUGE_MAX_JOBS_SERVER``)
    The same submit points, shared across sessions: beyond this many jobs queued or
    running, tell the user the server is busy instead of queueing more.
"""

from __future__ import annotations

import dataclasses
import os
from collections.abc import Mapping

#: Environment variable prefix shared by serve.py and the page.
ENV_PREFIX = "FRINGEGAUGE_"


@dataclasses.dataclass(frozen=True)
class Limits:
    """Safe defaults for one lab server (2 cores, a few simultaneous users)."""

    max_grid_points: int = 5_000_000
    max_photo_megapixels: float = 50.0
    max_upload_mb: float = 200.0
    max_jobs_per_session: int = 1
    max_jobs_server: int = 2

    def __post_init__(self):
        for field in dataclasses.fields(self):
            value = getattr(self, field.name)
            if not value > 0:
                raise ValueError(f"{field.name} must be positive, got {value!r}")

    @staticmethod
    def env_name(field_name: str) -> str:
        return ENV_PREFIX + field_name.upper()

    def to_env(self) -> dict[str, str]:
        """The environment variables that :meth:`from_env` reads back."""
        return {self.env_name(f.name): repr(getattr(self, f.name)) for f in dataclasses.fields(self)}

    @classmethod
    def from_env(cls, environ: Mapping[str, str] | None = None) -> Limits:
        """Limits from ``FRINGEGAUGE_*`` variables; unset ones keep their defaults.

        A malformed or non-positive value raises ``ValueError`` naming the variable.
        """
        environ = os.environ if environ is None else environ
        values = {}
        for field in dataclasses.fields(cls):
            name = cls.env_name(field.name)
            raw = environ.get(name)
            if raw is None or raw.strip() == "":
                continue
            kind = int if field.type in ("int", int) else float
            try:
                values[field.name] = kind(raw.replace("_", ""))
            except ValueError:
                raise ValueError(f"{name}={raw!r} is not a valid {kind.__name__}") from None
        return cls(**values)


# ---------------------------------------------------------------------- heavy jobs
import contextlib  # noqa: E402
import logging  # noqa: E402
import threading  # noqa: E402
import time  # noqa: E402

_log = logging.getLogger("fringegauge")
_slots_lock = threading.Lock()
_slots: threading.BoundedSemaphore | None = None
_slots_size = 0


def _server_slots(limits: Limits) -> threading.BoundedSemaphore:
    global _slots, _slots_size
    with _slots_lock:
        if _slots is None or _slots_size != limits.max_jobs_server:
            _slots, _slots_size = threading.BoundedSemaphore(limits.max_jobs_server), limits.max_jobs_server
        return _slots


@contextlib.contextmanager
def heavy_job(kind: str, size: int, session: str = "", limits: Limits | None = None):
    """Run one heavy job (a photo map, a fit) within the server-wide limit, and log one JSON-ready line.

    Raises ``physics.InputError`` at once, with a sentence for the user, when ``max_jobs_server``
    jobs are already running (nothing is queued behind them). The log line carries the session,
    kind, size, duration and outcome, never uploaded content.
    """
    from physics import InputError

    limits = limits or Limits.from_env()
    slots = _server_slots(limits)
    if not slots.acquire(blocking=False):
        _log.info("heavy job refused", extra={"session": session, "kind": kind, "size": int(size),
                                               "outcome": "busy"})
        raise InputError(f"The server is busy with {limits.max_jobs_server} other heavy computation(s); "
                         "try again in a moment.")
    t0 = time.perf_counter()
    outcome = "ok"
    try:
        yield
    except Exception as exc:
        outcome = "error" if isinstance(exc, ValueError) else "failed"
        raise
    finally:
        slots.release()
        _log.info("heavy job", extra={"session": session, "kind": kind, "size": int(size),
                                      "duration_s": round(time.perf_counter() - t0, 3), "outcome": outcome})
