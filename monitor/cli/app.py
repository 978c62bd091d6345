"""The ``quaywatch`` command line.

Each group of verbs lives in its own module of :mod:`monitor.cli` with a
``register(subparsers)`` function; this module only assembles them and turns expected errors into one-line
messages (a user never sees a traceback for bad input): the command line's own
:class:`~monitor.cli.errors.UserError`, the monitor's :class:`~monitor.errors.MonitorError` and
predictor's :class:`~predictor.errors.PredictorError` all become ``quaywatch VERB: message``, exit 2.
"""
from __future__ import annotations

import argparse
import logging
import sys
from importlib import metadata

from monitor.cli import alerts, extremes, qc, report, serve, station, tide
from monitor.cli.errors import UserError
from monitor.errors import MonitorError
from predictor.caution import CAUTION
from predictor.errors import PredictorError
from monitor.service.logs import log_formatter

# Verb groups, each owning its own module; order is the order shown in --help.
_GROUPS = (
    tide,      # fit, predict, table, datums
    station,   # check, run, status, ingest, export
    qc,        # qc, staff, flag
    alerts,    # alerts (list, outbox, test-mail)
    report,    # report
    serve,     # serve (live pages and reports over HTTP)
    extremes,  # extremes (return levels, sea-level trend)
)


def version() -> str:
    """The installed package's version (``pyproject.toml``), or ``unknown`` when not installed."""
    try:
        return metadata.version("quaywatch")
    except metadata.PackageNotFoundError:
        return "unknown (not installed)"


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="quaywatch",
        description="Tide-gauge station monitor: predicted tide, surge residual, quality "
        "control, alerts and reports. " + CAUTION,
    )
    parser.add_argument("-v", "--verbose", action="count", default=0, help="more log output")
    parser.add_argument("--version", action="version", version=f"%(prog)s {version()}")
    sub = parser.add_subparsers(dest="verb", metavar="VERB")
    sub.required = True
    for group in _GROUPS:
        group.register(sub)
    return parser


#: Verbs whose configuration file comes before their action (``alerts CONFIG episodes``), and
#: the actions; the older order ``staff add CONFIG`` is read too.
_CONFIG_FIRST = {"staff": ("add", "list"), "alerts": ("episodes", "outbox", "test-mail")}


def config_first(argv: list[str]) -> list[str]:
    """``VERB ACTION CONFIG ...`` rewritten as ``VERB CONFIG ACTION ...`` for the verbs of
    :data:`_CONFIG_FIRST`; anything else unchanged."""
    argv = list(argv)
    i = next((k for k, a in enumerate(argv) if not a.startswith("-")), None)
    if i is None or argv[i] not in _CONFIG_FIRST or len(argv) < i + 3:
        return argv
    action, then = argv[i + 1], argv[i + 2]
    if action in _CONFIG_FIRST[argv[i]] and not then.startswith("-") and then not in _CONFIG_FIRST[argv[i]]:
        argv[i + 1], argv[i + 2] = then, action
    return argv


def main(argv: list[str] | None = None) -> int:
    parser = build_parser()
    args = parser.parse_args(config_first(sys.argv[1:] if argv is None else argv))
    handler = logging.StreamHandler(sys.stderr)
    handler.setFormatter(log_formatter())
    logging.basicConfig(
        level=logging.DEBUG if args.verbose > 1 else logging.INFO if args.verbose else logging.WARNING,
        handlers=[handler],
    )
    try:
        return int(args.func(args) or 0)
    except (UserError, MonitorError, PredictorError) as exc:
        print(f"quaywatch {args.verb}: {exc}", file=sys.stderr)
        return 2
    except BrokenPipeError:
        return 0
    except KeyboardInterrupt:
        return 130


if __name__ == "__main__":
    sys.exit(main())
