"""Notice when the event loop is held up, and log where.

Every page's changes, every login and ``/health`` are answered by one thread, the event loop. A
thread of this module puts a no-op on the loop every :data:`PROBE_EVERY_S` and sees how long it
waits; while one waits longer than :data:`STALL_S`, it looks at what the loop's thread is doing and,
once the loop is free again, logs one line with how long it was held and the innermost frames seen
(file, line, function): what to make faster or move off the loop, and how much of the time the loop's
thread spent computing (``loop_cpu_s``; the rest it waited for the interpreter lock or a core, which other
threads and processes held). It costs one wake-up a tenth of a second.
"""

from __future__ import annotations

import logging
import sys
import threading
import time
import traceback

__all__ = ["StallWatch", "STALL_S"]

_log = logging.getLogger("fringegauge")

#: How often the loop is probed (s).
PROBE_EVERY_S = 0.1
#: A wait longer than this is logged (s): a person notices half a second.
STALL_S = 0.5
#: Frames kept in a log line, innermost last.
FRAMES = 6


class StallWatch:
    """Probe ``loop`` (an asyncio loop running in the thread ``loop_thread_id``) from a daemon thread."""

    def __init__(self, loop, loop_thread_id: int, stall_s: float = STALL_S):
        self.loop, self.loop_thread_id, self.stall_s = loop, loop_thread_id, stall_s
        self.worst_s = 0.0
        self.stalls = 0
        self._stop = threading.Event()
        self._thread = threading.Thread(target=self._run, daemon=True, name="fringegauge-stall-watch")
        try:
            self._loop_clock = time.pthread_getcpuclockid(loop_thread_id)
        except (AttributeError, OSError, OverflowError):    # no per-thread CPU clock on this system
            self._loop_clock = None

    def _loop_cpu_s(self) -> float | None:
        if self._loop_clock is None:
            return None
        try:
            return time.clock_gettime(self._loop_clock)
        except OSError:                                     # the loop's thread has ended
            return None

    def start(self) -> StallWatch:
        self._thread.start()
        return self

    def stop(self) -> None:
        self._stop.set()

    def _where(self) -> list[str]:
        frame = sys._current_frames().get(self.loop_thread_id)
        if frame is None:
            return []
        stack = traceback.extract_stack(frame)
        # The innermost frames say what runs; the innermost of this project's own frames say on whose behalf.
        ours = [s for s in stack[:-FRAMES] if "site-packages" not in s.filename and "/lib/python" not in s.filename
                and not s.filename.startswith("<")][-FRAMES:]
        shown = [*ours, *(["…"] if ours else []), *stack[-FRAMES:]]
        return [s if isinstance(s, str) else f"{s.filename.rsplit('site-packages/', 1)[-1]}:{s.lineno} {s.name}"
                for s in shown]

    def _run(self) -> None:
        while not self._stop.wait(PROBE_EVERY_S):
            answered = threading.Event()
            t0, cpu0 = time.perf_counter(), self._loop_cpu_s()
            try:
                self.loop.call_soon_threadsafe(answered.set)
            except RuntimeError:                     # the loop has closed
                return
            where = None
            while not answered.wait(0.05):
                if self._stop.is_set():
                    return
                if where is None and time.perf_counter() - t0 > self.stall_s:
                    where = self._where()            # what holds the loop, seen while it holds it
            held = time.perf_counter() - t0
            self.worst_s = max(self.worst_s, held)
            if held > self.stall_s:
                self.stalls += 1
                cpu1 = self._loop_cpu_s()
                cpu = None if cpu0 is None or cpu1 is None else round(cpu1 - cpu0, 3)
                _log.warning("event loop held up", extra={"held_s": round(held, 3), "loop_cpu_s": cpu, "where": where or []})
