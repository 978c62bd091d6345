"""``quaywatch serve``: serves the live folder and the reports read-only, refuses ``..`` (plain,
encoded, backslashed), absolute and hidden paths and symbolic links leaving the folder, lists
no directory, and serves nothing outside its folders."""
from __future__ import annotations

import http.client
import os
import subprocess
import sys
import threading
from pathlib import Path

import pytest

from alerts.live.server import make_server, resolve_request

ROOT = Path(__file__).resolve().parent.parent


@pytest.fixture
def tree(tmp_path):
    """live/ and reports/ beside a secret file, a symlink out, a folder without an index."""
    live, reports = tmp_path / "live", tmp_path / "reports"
    (reports / "skerrin").mkdir(parents=True)
    live.mkdir()
    (live / "index.html").write_text("<p>overview</p>")
    (live / "skerrin.html").write_text("<p>skerrin</p>")
    (live / "skerrin.json").write_text('{"stale": false}')
    (live / ".skerrin.html.tmp").write_text("half written")
    (live / "notes.sh").write_text("echo no")
    (live / "empty").mkdir()
    (reports / "index.html").write_text("<p>reports</p>")
    (reports / "skerrin" / "2025-10-22.html").write_text("<p>day</p>")
    (tmp_path / "secret.toml").write_text("password = 'x'")
    (tmp_path / "secret.html").write_text("<p>password</p>")  # a page type, outside the folder
    os.symlink(tmp_path / "secret.html", live / "escape.html")
    os.symlink(tmp_path, live / "up")
    os.symlink(live / "skerrin.html", live / "alias.html")  # a link inside the folder is fine
    return tmp_path


@pytest.fixture
def server(tree):
    srv = make_server(tree / "live", tree / "reports", "127.0.0.1", 0)
    thread = threading.Thread(target=srv.serve_forever, kwargs={"poll_interval": 0.05}, daemon=True)
    thread.start()
    yield srv.server_address[1]
    srv.shutdown()
    srv.server_close()


def _get(port: int, target: str, method: str = "GET") -> tuple[int, bytes]:
    conn = http.client.HTTPConnection("127.0.0.1", port, timeout=30)
    try:
        conn.putrequest(method, target, skip_host=False, skip_accept_encoding=True)
        conn.endheaders()
        res = conn.getresponse()
        return res.status, res.read()
    finally:
        conn.close()


@pytest.mark.parametrize("target, body", [
    ("/", b"<p>overview</p>"),
    ("/skerrin.html", b"<p>skerrin</p>"),
    ("/skerrin.json?t=1", b'{"stale": false}'),
    ("/alias.html", b"<p>skerrin</p>"),
    ("/reports/", b"<p>reports</p>"),
    ("/reports/skerrin/2025-10-22.html", b"<p>day</p>"),
])
def test_serves_the_pages(server, target, body):
    assert _get(server, target) == (200, body)


@pytest.mark.parametrize("target", [
    "/../secret.toml", "/reports/../../secret.toml", "/%2e%2e/secret.toml", "/%2E%2E%2Fsecret.toml",
    "/..%2fsecret.toml", "/..%5csecret.toml", "/..\\secret.toml", "/%252e%252e/secret.toml",
    "//etc/passwd", "/escape.html", "/up/secret.toml", "/up/secret.html", "/../secret.html",
    "/reports/../secret.html", "/%2e%2e/secret.html", "/.skerrin.html.tmp", "/notes.sh",
    "/empty/", "/reports/skerrin/", "/skerrin.html%00.json", "http://example.com/../secret.toml",
    "/./skerrin.html",
])
def test_refuses_what_is_outside_or_not_a_page(server, target):
    status, body = _get(server, target)
    assert status == 404
    assert b"password" not in body and b"echo" not in body


def test_no_directory_listing(server):
    status, body = _get(server, "/empty/")
    assert status == 404 and b"skerrin" not in body


def test_read_only(server):
    assert _get(server, "/skerrin.html", "POST")[0] == 405
    assert _get(server, "/skerrin.html", "PUT")[0] == 405
    assert _get(server, "/skerrin.html", "HEAD") == (200, b"")


def test_resolve_never_leaves_its_folders(tree):
    # every file under the test tree, asked for by every path that leads to it
    mounts = {"/": tree / "live", "/reports/": tree / "reports"}
    inside = {(tree / "live").resolve(), (tree / "reports").resolve()}
    for target in ("/../secret.html", "/up/secret.html", "/escape.html", "/reports/../secret.html", "/skerrin.html"):
        found = resolve_request(target, mounts)
        assert found is None or any(found.is_relative_to(root) for root in inside)


def test_serve_verb_binds_loopback_and_stops(tree):
    cfg = tree / "config.toml"
    cfg.write_text("""
[live]
folder = "live"
[reports]
folder = "reports"
[[stations]]
id = "skerrin"
latitude = 54.0
longitude = -10.0
constants = "history"
[stations.sensors.primary]
""")
    env = dict(os.environ, PYTHONPATH=str(ROOT))
    proc = subprocess.Popen([sys.executable, "-m", "monitor", "serve", str(cfg), "--port", "0"], cwd=tree,
                            env=env, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    try:
        first = proc.stdout.readline()  # waits for the server to say where it listens
        assert first.startswith(f"serving {tree / 'live'} at http://127.0.0.1:"), first
        port = int(first.split("http://127.0.0.1:")[1].split("/")[0])
        assert _get(port, "/skerrin.html") == (200, b"<p>skerrin</p>")
        assert _get(port, "/../config.toml")[0] == 404
    finally:
        proc.terminate()
        proc.wait(timeout=60)
    assert proc.returncode == 0


def test_serve_without_a_live_table_says_so(tmp_path):
    cfg = tmp_path / "config.toml"
    cfg.write_text('[[stations]]\nid = "a"\nlatitude = 1.0\nlongitude = 1.0\nconstants = "history"\n'
                   '[stations.sensors.primary]\n')
    res = subprocess.run([sys.executable, "-m", "monitor", "serve", str(cfg)], capture_output=True, text=True,
                         cwd=ROOT, timeout=120)
    assert res.returncode == 2 and "no [live] table" in res.stderr and "Traceback" not in res.stderr
