"""Start `panel serve app.py` on a free loopback port for browser tests and benchmarks."""

from __future__ import annotations

import contextlib
import os
import socket
import subprocess
import sys
import time
import urllib.request
from pathlib import Path

ROOT = Path(__file__).resolve().parents[2]
CHROMIUM = "/usr/bin/chromium"
CHROMIUM_ARGS = ["--no-sandbox", "--disable-gpu", "--disable-background-networking", "--disable-quic",
                 "--no-first-run", "--disable-component-update", "--disable-sync"]
#: Seconds to wait for the server to answer its first request.
START_TIMEOUT_S = 60


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


@contextlib.contextmanager
def _running(cmd, cwd, log_path, ready_url, what, env=None):
    """Start ``cmd`` with its output in ``log_path``, wait until ``ready_url`` answers, yield the process;
    stop it afterwards."""
    with open(log_path, "w") as out:
        proc = subprocess.Popen(cmd, cwd=cwd, stdout=out, stderr=subprocess.STDOUT,
                                env={**os.environ, "PYTHONUNBUFFERED": "1", **(env or {})})
        try:
            wait_until_up(proc, ready_url, log_path, what)
            yield proc
        finally:
            stop(proc)


@contextlib.contextmanager
def served_app(extra_args=(), env=None):
    """Yield (url, log_path) of a running app (``env``: extra environment variables); stop it afterwards."""
    port = free_port()
    log_path = ROOT / f".server-{port}.log"
    url = f"http://127.0.0.1:{port}/app"
    cmd = [sys.executable, "-m", "panel", "serve", "app.py", "--port", str(port), "--address", "127.0.0.1",
           "--allow-websocket-origin", f"127.0.0.1:{port}", *extra_args]
    try:
        with _running(cmd, ROOT, log_path, url, "the app", env):
            yield url, log_path
    finally:
        with contextlib.suppress(OSError):
            log_path.unlink()


@contextlib.contextmanager
def served_lab(workdir, *args, env=None):
    """Run ``serve.py`` (the lab command) from ``workdir`` on a free loopback port, with its library in
    ``workdir/library``; yield (base_url, process, log_path); stop it afterwards."""
    workdir = Path(workdir)
    port = free_port()
    log_path = workdir / "server.log"
    base = f"http://127.0.0.1:{port}"
    cmd = [sys.executable, str(ROOT / "serve.py"), "--host", "127.0.0.1", "--port", str(port),
           "--library", str(workdir / "library"), *args]
    with _running(cmd, workdir, log_path, base + "/health", "serve.py", env) as proc:
        yield base, proc, log_path


def wait_until_up(proc, url, log_path, what, timeout_s=START_TIMEOUT_S):
    """Poll ``url`` until it answers; raise with the server's output if it dies or times out."""
    deadline = time.time() + timeout_s
    while True:
        try:
            urllib.request.urlopen(url, timeout=5).read(100)
            return
        except Exception:
            if proc.poll() is not None or time.time() > deadline:
                raise RuntimeError(f"{what} did not start:\n" + log_path.read_text())
            time.sleep(0.2)


def stop(proc):
    """Terminate a server process, killing it if it does not stop within 10 s."""
    proc.terminate()
    try:
        proc.wait(timeout=10)
    except subprocess.TimeoutExpired:
        proc.kill()
        proc.wait()


DEEP_TEXT_JS = """
(sel) => {
  const walk = (root) => {
    const el = root.querySelector(sel);
    if (el) return el;
    for (const host of root.querySelectorAll('*')) {
      if (host.shadowRoot) { const f = walk(host.shadowRoot); if (f) return f; }
    }
    return null;
  };
  const el = walk(document);
  return el ? el.textContent : null;
}
"""
