"""serve.py: options, validation, /health, the page, basic auth and keeping the password out of logs."""

from __future__ import annotations

import contextlib
import json
import os
import subprocess
import sys
import time
import urllib.error
import urllib.request
from pathlib import Path

import pytest

from tests.support.server import served_lab
from views.limits import Limits

#: Times the server: in a parallel run, each test runs while no other test does (tests/conftest.py).
pytestmark = pytest.mark.exclusive

ROOT = Path(__file__).resolve().parents[1]
SERVE = ROOT / "serve.py"
OPTIONS = ["--host", "--port", "--allow-origin", "--threads", "--library", "--basic-auth", "--cookie-secret-file",
           "--idle-timeout-s", "--max-grid-points", "--max-photo-megapixels", "--max-upload-mb",
           "--max-jobs-per-session", "--max-jobs-server", "--oauth-provider", "--oauth-redirect-uri", "--tls-cert",
           "--tls-key", "--login-hours", "--max-sessions", "--max-sessions-per-address", "--page-opens-per-minute",
           "--loop-share-per-address", "--pages-waiting-per-address", "--library-key-file"]


def run_serve(*args, cwd, env=None, timeout=30):
    return subprocess.run([sys.executable, str(SERVE), *args], cwd=cwd, capture_output=True, text=True,
                          timeout=timeout, env={**os.environ, **(env or {})})


class _NoRedirect(urllib.request.HTTPRedirectHandler):
    def redirect_request(self, *args, **kwargs):
        return None


def get(url, follow=True):
    """(status, headers, body) without raising on 3xx/4xx."""
    opener = urllib.request.build_opener() if follow else urllib.request.build_opener(_NoRedirect)
    try:
        with opener.open(url, timeout=10) as resp:
            return resp.status, resp.headers, resp.read().decode("utf-8", "replace")
    except urllib.error.HTTPError as err:
        return err.code, err.headers, err.read().decode("utf-8", "replace")


@contextlib.contextmanager
def served(tmp_path, *args, env=None):
    """Run serve.py from an unrelated directory on a free loopback port; yield (base_url, read_output)."""
    with served_lab(tmp_path, *args, env=env) as (base, _proc, log_path):
        yield base, log_path.read_text


def test_help_lists_every_option(tmp_path):
    result = run_serve("--help", cwd=tmp_path)
    assert result.returncode == 0
    for option in OPTIONS:
        assert option in result.stdout, option
    assert "0.0.0.0 to serve the lab network" in result.stdout
    assert "5006" in result.stdout and "900" in result.stdout and "20000000" in result.stdout
    assert not (tmp_path / "lab-library").exists()


@pytest.mark.parametrize("args, message", [
    (["--port", "70000"], "--port"),
    (["--port", "0"], "--port"),
    (["--port", "http"], "--port"),
    (["--threads", "0"], "--threads"),
    (["--max-grid-points", "-5"], "--max-grid-points"),
    (["--max-photo-megapixels", "0"], "--max-photo-megapixels"),
    (["--max-upload-mb", "-1"], "--max-upload-mb"),
    (["--max-jobs-per-session", "0"], "--max-jobs-per-session"),
    (["--max-jobs-server", "-2"], "--max-jobs-server"),
    (["--idle-timeout-s", "-1"], "--idle-timeout-s"),
    (["--basic-auth", "no-such-file"], "password file"),
    (["--oauth-provider", "myspace"], "--oauth-provider"),
    (["--oauth-provider", "github"], "PANEL_OAUTH_KEY"),
])
def test_bad_arguments_exit_2_with_a_message(tmp_path, args, message):
    result = run_serve(*args, cwd=tmp_path)
    assert result.returncode == 2
    assert message in result.stderr
    assert "Traceback" not in result.stderr


def test_a_folder_that_is_not_a_library_and_a_key_inside_the_library_are_refused_at_start(tmp_path):
    other = tmp_path / "home-folder"
    other.mkdir()
    (other / "thesis.txt").write_text("someone's files")
    result = run_serve("--library", str(other), cwd=tmp_path)
    assert result.returncode == 2 and "library" in result.stderr and (other / "thesis.txt").exists()
    lib = tmp_path / "lib"
    result = run_serve("--library", str(lib), "--library-key-file", str(lib / "k.key"), cwd=tmp_path)
    assert result.returncode == 2 and "key" in result.stderr.lower()


@pytest.mark.parametrize("args, message", [
    (["--tls-cert", "cert.pem"], "--tls-key"),
    (["--tls-cert", "missing.pem", "--tls-key", "missing.key"], "not a file"),
    (["--loop-share-per-address", "1.5"], "fraction"),
    (["--max-sessions", "0"], "--max-sessions"),
])
def test_bad_tls_and_page_limits_exit_2_with_a_message(tmp_path, args, message):
    (tmp_path / "cert.pem").write_text("not a certificate")
    result = run_serve(*args, cwd=tmp_path)
    assert result.returncode == 2 and message in result.stderr, result.stderr


def test_oauth_needs_a_cookie_secret_and_keeps_its_client_secret_quiet(tmp_path):
    env = {"PANEL_OAUTH_KEY": "lab-client-id", "PANEL_OAUTH_SECRET": "zq-client-secret-93"}
    result = run_serve("--oauth-provider", "generic", cwd=tmp_path, env=env)
    assert result.returncode == 2 and "cookie secret" in result.stderr
    assert "zq-client-secret-93" not in result.stderr + result.stdout


def test_short_cookie_secret_is_refused_without_echoing_it(tmp_path):
    secret = "tooshort-zq81"
    (tmp_path / "secret").write_text(secret)
    result = run_serve("--cookie-secret-file", str(tmp_path / "secret"), cwd=tmp_path)
    assert result.returncode == 2 and "cookie secret" in result.stderr
    assert secret not in result.stderr + result.stdout
    result = run_serve(cwd=tmp_path, env={"FRINGEGAUGE_COOKIE_SECRET": secret})
    assert result.returncode == 2 and secret not in result.stderr + result.stdout


def test_limits_round_trip_through_the_environment():
    limits = Limits(max_grid_points=123, max_photo_megapixels=2.5, max_upload_mb=7,
                    max_jobs_per_session=3, max_jobs_server=4)
    assert Limits.from_env(limits.to_env()) == limits
    assert Limits.from_env({}) == Limits()
    with pytest.raises(ValueError, match="FRINGEGAUGE_MAX_GRID_POINTS"):
        Limits.from_env({"FRINGEGAUGE_MAX_GRID_POINTS": "lots"})
    with pytest.raises(ValueError):
        Limits.from_env({"FRINGEGAUGE_MAX_JOBS_SERVER": "0"})


def test_serves_health_and_the_page_from_any_directory(tmp_path):
    with served(tmp_path, "--max-grid-points", "1234") as (base, output):
        status, headers, body = get(base + "/health")
        assert status == 200 and headers["Content-Type"].startswith("application/json")
        health = json.loads(body)
        assert health["status"] == "ok" and health["sessions"] >= 0 and health["uptime_s"] >= 0
        assert health["heavy_jobs"] == 0 and health["max_jobs_server"] == 2
        status, _, body = get(base + "/app")
        assert status == 200 and "fringegauge" in body
        assert json.loads(get(base + "/health")[2])["sessions"] >= 1
        assert (tmp_path / "library").is_dir()
        lines = [json.loads(line) for line in output().splitlines() if line.startswith("{")]
        started = [line for line in lines if line.get("message") == "serving"]
        assert started and started[0]["level"] == "INFO" and "timestamp" in started[0]
        assert started[0]["max_grid_points"] == 1234 and started[0]["auth"] == "off"


def test_basic_auth_guards_the_page_and_keeps_the_password_quiet(tmp_path):
    password = "Plat1num-Fringe-7731"
    secret = "c" * 40 + "-cookie-9f3e"
    (tmp_path / "password.txt").write_text(password + "\n")
    with served(tmp_path, "--basic-auth", str(tmp_path / "password.txt"),
                env={"FRINGEGAUGE_COOKIE_SECRET": secret}) as (base, output):
        status, headers, body = get(base + "/app", follow=False)
        assert status in (302, 401, 403)
        if status == 302:
            assert "/login" in headers["Location"]
        status, _, body = get(base + "/app")  # following the redirect lands on the login form
        assert status == 200 and 'name="password"' in body and "render_items" not in body   # the form, not the page
        assert json.loads(get(base + "/health")[2])["status"] == "ok"  # monitoring needs no login
        log = output()
        assert '"auth": "basic"' in log
    log = output()
    assert password not in log and secret not in log


def test_sessions_whose_browser_went_away_are_freed_after_the_idle_timeout(tmp_path):
    with served(tmp_path, "--idle-timeout-s", "1.5") as (base, output):
        assert get(base + "/app")[0] == 200              # a page load makes a session no browser keeps
        assert json.loads(get(base + "/health")[2])["sessions"] >= 1
        deadline = time.time() + 20
        while json.loads(get(base + "/health")[2])["sessions"] and time.time() < deadline:
            time.sleep(0.5)
        assert json.loads(get(base + "/health")[2])["sessions"] == 0
        assert get(base + "/app")[0] == 200              # and it keeps serving
        assert "Traceback" not in output()
