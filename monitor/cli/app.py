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

from monitor.cli import alerts, extremes, qc, report, station, tide
from monitor.cli.errors import UserError
from monitor.errors import MonitorError
from predictor.caution import CAUTION
from predictor.errors import PredictorError

# Verb groups, each owning its own module; order is the order shown in --help.
_GROUPS = (
    tide,      # fit, predict, table, datums
    station,   # check, run, status, ingest, export
    qc,        # qc, staff, flag
    alerts,    # alerts (list, outbox, test-mail)
    report,    # report
    extremes,  # extremes (return levels, sea-level trend)
)


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="quaywatch",
        description="Tide-gauge station monitor: predicted tide, surge residual, quality "
        "control, alerts and reports. " + CAUTION,
    )
    parser.add_argument("-v", "--verbose", action="count", default=0, help="more log output")
    sub = parser.add_subparsers(dest="verb", metavar="VERB")
    sub.required = True
    for group in _GROUPS:
        group.register(sub)
    return parser


def main(argv: list[str] | None = None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    logging.basicConfig(
        level=logging.DEBUG if args.verbose > 1 else logging.INFO if args.verbose else logging.WARNING,
        format="%(asctime)s %(levelname)s %(name)s: %(message)s",
        stream=sys.stderr,
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
