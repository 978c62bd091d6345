"""``quaywatch serve CONFIG [--host H] [--port P]``: the live pages and the daily reports,
read-only over HTTP, for a harbour office without a web server of its own.

Serves the ``[live]`` folder at ``/`` (its ``index.html`` lists the stations) and the reports
folder at ``/reports/``; binds 127.0.0.1 unless ``--host`` says otherwise. Stops on Ctrl-C
or SIGTERM.
"""
from __future__ import annotations

import argparse
import signal
import sys
import threading
from pathlib import Path

from alerts.live.server import DEFAULT_PORT, make_server
from monitor.cli.common import CAUTION
from monitor.cli.errors import UserError
from monitor.service.config import load_config


def register(subparsers) -> None:
    p = subparsers.add_parser(
        "serve", help="serve the live pages and the reports read-only over HTTP",
        description="Serve the live folder ([live] folder) at / and the reports folder at /reports/, "
        "read-only, for phones and desks on the harbour office's network. Only files inside those "
        "folders are served; no directory listing. " + CAUTION)
    p.add_argument("config", metavar="CONFIG", help="the configuration file (TOML)")
    p.add_argument("--host", default="127.0.0.1",
                   help="address to listen on (default 127.0.0.1, this machine only; 0.0.0.0 for every network)")
    p.add_argument("--port", type=_port, default=DEFAULT_PORT, help=f"TCP port (default {DEFAULT_PORT}; 0: any free one)")
    p.set_defaults(func=cmd_serve)


def _port(text: str) -> int:
    try:
        value = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected a port number from 0 to 65535, got {text!r}") from None
    if not 0 <= value <= 65535:
        raise argparse.ArgumentTypeError(f"expected a port number from 0 to 65535, got {text!r}")
    return value


def _folders(cfg) -> tuple[Path, Path | None]:
    if cfg.live is None:
        raise UserError(f"{cfg.path}: no [live] table, so the daemon writes no live pages to serve "
                        f"(add one; see config.example.toml)")
    live = Path(cfg.live.folder)
    reports = Path(cfg.reports.folder) if cfg.reports is not None else cfg.base_dir / "reports"
    return live, reports if reports.is_dir() else None


def cmd_serve(args: argparse.Namespace) -> int:
    cfg = load_config(args.config)
    live, reports = _folders(cfg)
    try:
        server = make_server(live, reports, args.host, args.port)
    except OSError as exc:
        raise UserError(f"cannot listen on {args.host}:{args.port}: {exc.strerror or exc}") from None
    host, port = server.server_address[:2]
    shown = f"[{host}]" if ":" in str(host) else host
    print(f"serving {live} at http://{shown}:{port}/"
          + (f" and {reports} at http://{shown}:{port}/reports/" if reports else "")
          + " (read-only; Ctrl-C stops)", flush=True)
    if not live.is_dir():
        print(f"note: {live} does not exist yet; the daemon (quaywatch run) writes it", flush=True)
    print(CAUTION, flush=True)
    stop = threading.Event()

    def on_signal(signum, _frame):
        stop.set()

    old = signal.signal(signal.SIGTERM, on_signal)
    thread = threading.Thread(target=server.serve_forever, kwargs={"poll_interval": 0.2}, daemon=True)
    thread.start()
    try:
        while not stop.is_set():
            stop.wait(0.5)
    except KeyboardInterrupt:
        pass
    finally:
        server.shutdown()
        server.server_close()
        signal.signal(signal.SIGTERM, old)
    print("stopped", file=sys.stderr)
    return 0
