"""``quaywatch alerts CONFIG episodes|outbox|test-mail``: look at alert episodes and the
outbox, and check the mail settings with a test message that goes through the outbox."""
from __future__ import annotations

import argparse
import time
import uuid
from datetime import timezone
from email.utils import parseaddr
from pathlib import Path
from zoneinfo import ZoneInfo

from alerts.engine import list_episodes
from alerts.mail.message import compose_test
from alerts.mail.outbox import deliver_due
from alerts.mail.outbox import enqueue
from alerts.mail.outbox import list_outbox
from alerts.mail.outbox import outbox_row
from monitor.cli.common import CAUTION, positive_int, store_errors
from monitor.cli.common import table as _common_table
from monitor.cli.errors import UserError
from monitor.cli.timeparse import local_text
from monitor.service.config import load_config
from monitor.store.database import Store



def register(subparsers) -> None:
    p = subparsers.add_parser(
        "alerts", help="alert episodes, the outbox, and a test email",
        description="Show alert episodes and the outbox, or send a test email through the outbox. "
        + CAUTION)
    p.add_argument("config", metavar="CONFIG", help="the configuration file (TOML)")
    sub = p.add_subparsers(dest="alerts_action", metavar="ACTION")
    sub.required = True

    ep = sub.add_parser("episodes", help="recent alert episodes, newest first")
    ep.add_argument("--station", help="only this station")
    ep.add_argument("--open", action="store_true", help="only episodes still in progress")
    ep.add_argument("--limit", type=positive_int, default=30, help="how many (default 30)")
    ep.set_defaults(func=store_errors(cmd_episodes))

    ob = sub.add_parser("outbox", help="recent outbox messages and their delivery state")
    ob.add_argument("--status", choices=("pending", "sending", "sent", "expired"), help="only this state")
    ob.add_argument("--limit", type=positive_int, default=30, help="how many (default 30)")
    ob.set_defaults(func=store_errors(cmd_outbox))

    tm = sub.add_parser("test-mail", help="send a test email through the outbox and report the result")
    tm.add_argument("--to", metavar="ADDR", help="recipient (default: the sender address)")
    tm.add_argument("--wait", type=float, default=20.0, metavar="SECONDS",
                    help="how long to wait for delivery (default 20)")
    tm.set_defaults(func=store_errors(cmd_test_mail))


# --------------------------------------------------------------------------- helpers

def _config(path: str):
    return load_config(path)


def _store_path(cfg) -> Path:
    return Path(cfg.store_path)


def _open(cfg, create: bool = False):
    """The store's sqlite_utils.Database, without the daemon's lock (it may be running)."""
    path = _store_path(cfg)
    if not create and not path.exists():
        raise UserError(f"{cfg.path or 'configuration'}: store.path {str(path)!r} does not exist yet "
                        f"(the daemon creates it: quaywatch run CONFIG)")
    return Store.open(path, lock=False, create=create).db


def _zone_for(cfg, station: str | None):
    stations = list(getattr(cfg, "stations", ()) or ())
    for st in stations:
        if st.id == station:
            return ZoneInfo(st.tz)
    if len(stations) == 1:
        return ZoneInfo(stations[0].tz)
    return timezone.utc


def _local(t, zone) -> str:
    return local_text(t, zone)


def _table(headers: list[str], rows: list[list[str]]) -> str:
    return _common_table(rows, headers)


def _zone_note(cfg, station: str | None) -> str:
    """Which zone the times are in, said above a table."""
    stations = list(getattr(cfg, "stations", ()) or ())
    if station is None and len(stations) > 1:
        return "times in each station's local zone (abbreviation shown); levels in metres"
    zone = _zone_for(cfg, station)
    return f"times in {getattr(zone, 'key', 'UTC')} (abbreviation shown); levels in metres"


def _peak(cfg, r: dict) -> str:
    """An episode's peak as its station shows levels: a level moved from the rule's datum to
    the station's display datum and named, a residual with its sign."""
    v, watch = r.get("peak"), r.get("watch") or ""
    if v is None or r.get("unit") != "m":
        return _value(v, r.get("unit"))
    if watch.startswith("residual"):
        return f"{v:+.2f} m"
    st = next((s for s in getattr(cfg, "stations", ()) or () if s.id == r["station"]), None)
    if st is None:
        return f"{v:.2f} m"
    level = v + float(st.datums.get(r.get("datum") or "station", 0.0)) - st.display_offset
    return f"{level:.2f} m above {st.display_label}"


def _value(v, unit) -> str:
    if v is None:
        return "-"
    if unit == "m":
        return f"{v:.2f} m"
    if unit == "s":
        return f"{v / 60:.0f} min"
    if unit == "":
        n = int(round(v))
        return f"{n} fault{'s' if n != 1 else ''}"
    return f"{v:g} {unit}".strip()


# --------------------------------------------------------------------------- commands

def cmd_episodes(args: argparse.Namespace) -> int:
    cfg = _config(args.config)
    if args.station:
        cfg.station(args.station)  # a UserError naming the known stations
    db = _open(cfg)
    rows = list_episodes(db, station=args.station, limit=max(1, args.limit) * (10 if args.open else 1))
    if args.open:
        rows = [r for r in rows if r["closed_at"] is None][: args.limit]
    if not rows:
        print("no alert episodes" + (" in progress" if args.open else ""))
        return 0
    out = []
    for r in rows:
        zone = _zone_for(cfg, r["station"])
        out.append([str(r["id"]), r["station"], r["rule"], _local(r["opened_at"], zone),
                    _local(r["closed_at"], zone) if r["closed_at"] else "in progress",
                    r["top_step"] or "-", r["step_now"] or "-", _peak(cfg, r),
                    str(r["messages"] or 0)])
    print(_zone_note(cfg, args.station))
    print(_table(["id", "station", "rule", "opened", "closed", "highest step", "now", "peak", "mails"], out))
    print(CAUTION)
    return 0


def cmd_outbox(args: argparse.Namespace) -> int:
    cfg = _config(args.config)
    db = _open(cfg)
    rows = list_outbox(db, limit=max(1, args.limit), status=args.status)
    if not rows:
        print("the outbox is empty" if not args.status else f"no {args.status} messages")
        return 0
    zone = _zone_for(cfg, None)
    out = []
    for r in rows:
        if r["status"] == "sent":
            when = _local(r["sent_at"], zone)
        elif r["status"] == "expired":
            when = _local(r["expired_at"], zone)
        else:
            when = "next " + _local(r["next_try"], zone)
        subject = r["subject"] if len(r["subject"]) <= 60 else r["subject"][:57] + "..."
        out.append([str(r["id"]), _local(r["created_at"], zone), r["kind"], r["recipient"], r["status"],
                    str(r["attempts"] or 0), when, subject])
    print(_zone_note(cfg, None).split(";")[0])
    print(_table(["id", "queued", "kind", "to", "state", "tries", "when", "subject"], out))
    failing = [r for r in rows if r["status"] in ("pending", "expired") and r["last_error"]]
    for r in failing:
        print(f"  #{r['id']} last error: {r['last_error']}")
    expired = [r for r in rows if r["status"] == "expired"]
    if expired:
        print(f"{len(expired)} message(s) expired undelivered: check the mail settings and tell the "
              f"recipients another way.")
    return 0


def cmd_test_mail(args: argparse.Namespace) -> int:
    cfg = _config(args.config)
    settings = getattr(cfg, "mail", None)
    if settings is None:
        raise UserError(f"{cfg.path or 'configuration'}: no [mail] table; add sender and host "
                        f"(see config.example.toml)")
    to = args.to or parseaddr(settings.sender)[1]
    addr = parseaddr(to)[1]
    if not addr or "@" not in addr or addr != to.strip() or any(c in to for c in "\r\n,;<>"):
        raise UserError(f"--to: not a plain email address: {to!r}")
    db = _open(cfg, create=True)
    now = time.time()
    subject, text, html = compose_test(now, settings.host or (settings.save_dir or ""))
    [oid] = enqueue(db, [addr], subject, text, html, "test", f"test/{uuid.uuid4().hex}", now=now)
    print(f"queued test message #{oid} to {addr}")
    deadline = time.monotonic() + max(0.0, args.wait)
    while True:
        deliver_due(db, settings, now=time.time(), recipients=[addr])
        row = outbox_row(db, oid)
        if row["status"] == "sent":
            via = f"{settings.host}:{settings.port}" if settings.host else f"folder {settings.save_dir}"
            print(f"sent: accepted by {via} (Message-ID {row['message_id']})")
            return 0
        if row["status"] == "expired" or time.monotonic() >= deadline:
            break
        time.sleep(0.5)
    ahead = [r for r in db.query(
        "SELECT id FROM outbox WHERE recipient = ? AND id < ? AND status NOT IN ('sent', 'expired')",
        [addr, oid])]
    print(f"not delivered yet: state {row['status']}, {row['attempts'] or 0} attempt(s)")
    if row["last_error"]:
        print(f"  last error: {row['last_error']}")
    if ahead:
        print(f"  {len(ahead)} earlier message(s) to {addr} are still waiting and go first")
    print("  the message stays in the outbox; the daemon keeps retrying it")
    return 1
