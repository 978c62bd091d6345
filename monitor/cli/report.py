"""``quaywatch report CONFIG --station ID --date YYYY-MM-DD``: write a station's daily report
on demand (and, with ``--email``, queue it to the report recipients through the outbox).

The daemon's scheduler calls :func:`monitor.service.reporting.write_due_reports` for the scheduled ones.
"""
from __future__ import annotations

import datetime as dt
from pathlib import Path
from zoneinfo import ZoneInfo

from monitor.cli.common import CAUTION
from monitor.cli.errors import UserError
from monitor.cli.timeparse import parse_date
from monitor.service.config import load_config
from monitor.service.reporting import find_station
from monitor.service.reporting import write_station_day
from monitor.store.database import Store


def register(subparsers) -> None:
    p = subparsers.add_parser(
        "report", help="write a station's daily report (HTML) on demand",
        description="Write the daily HTML report of one station for one local day, to "
        "<reports.folder>/<station>/<YYYY-MM-DD>.html, and refresh <reports.folder>/index.html. "
        + CAUTION)
    p.add_argument("config", metavar="CONFIG", help="the configuration file (TOML)")
    p.add_argument("--station", required=True, metavar="ID", help="station id from the configuration")
    p.add_argument("--date", "--day", dest="date", metavar="YYYY-MM-DD",
                   help="the station's local date (default: yesterday in the station's zone)")
    p.add_argument("--email", action="store_true",
                   help="also queue the report to reports.recipients through the outbox")
    p.set_defaults(func=cmd_report)


def _date(text: str | None, tz: str) -> dt.date:
    if text is None:
        return dt.datetime.now(ZoneInfo(tz)).date() - dt.timedelta(days=1)

    return parse_date(text, "--date")


def cmd_report(args) -> int:
    config = load_config(args.config)
    station = find_station(config, args.station)
    day = _date(args.date, station.tz)
    path = Path(config.store_path)
    if not path.exists():
        raise UserError(f"{args.config}: store.path {str(path)!r} does not exist yet "
                        "(run 'quaywatch run' or 'quaywatch ingest' first)")
    with Store.open(path, lock=False, create=False) as store:
        written = write_station_day(config, store, station, day, send=args.email)
    print(written)
    return 0
