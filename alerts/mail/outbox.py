"""Store-and-forward outbox and SMTP delivery.

Every message is written to the ``outbox`` table (one row per recipient) before any
attempt to send it.

Delivery is a real-world process: the queue time, the retry back-off and the expiry always
follow the wall clock (``time.time()``, or an injected ``clock`` function in tests), whatever
clock the alert rules run on. A replayed storm from years ago is queued now and delivered
now; the data time of the event it is about travels in the message text and in the row's
``event_at`` column, never in the delivery arithmetic. Delivery takes rows in order per recipient: an undelivered earlier
message blocks later ones to the same address, so nobody reads an all-clear before the
alert it closes. Each row carries a Message-ID fixed when it is queued; a row is marked
``sending`` (with a lease, and the process that claimed it) before the SMTP transaction
and ``sent`` after it, so a crash in between leads at worst to a resend that mail clients
recognise by its Message-ID, never to a loss. A daemon starting takes over at once the
claims of processes that are gone (:func:`take_over_claims`), so a kill with a message in
flight does not hold that recipient's later mail, the all-clear included, until the lease
lapses. Failures are retried with exponential back-off until the operator's
expiry, then the row is marked ``expired``, logged and listed, never dropped silently.

Mail settings (a ``[mail]`` table)::

    sender        = "Quay monitor <gauge@port.example>"
    host          = "smtp.port.example"
    port          = 587                    # default: 587 starttls, 465 tls, 25 none
    security      = "starttls"             # starttls | tls | none (none: loopback hosts only)
    user          = "gauge"                # omit for no authentication
    password_env  = "QUAYWATCH_SMTP_PASSWORD"   # or password_file = "/etc/quaywatch/smtp.pw"
    timeout       = "30s"
    retry_first   = "1min"                 # first back-off; doubles per failure
    retry_max     = "30min"                # longest back-off
    give_up_after = "2d"                   # then the message is marked expired and reported
    reply_to      = "harbour-office@port.example"   # optional
    save_dir      = "mail-copies"          # optional: a copy of every sent message as .eml;
                                           # with no host, messages are only saved there
    ca_file       = "/etc/quaywatch/smtp-ca.pem"   # optional: trust only the CA certificate(s)
                                           # in this PEM file for the server; default: the
                                           # system trust store

    [mail.forms]                           # optional: the form of alert email an address
    "volunteers@port.example" = "brief"    # gets (brief | full | gauge, see alerts.mail.forms);
                                           # default full

The server's certificate and host name are always verified (starttls and tls); there is no
setting that turns verification off. The password is read from the environment or its file
at each connection, never stored in the settings, the outbox table or a log line, and is
scrubbed from any error text before that is recorded. A password file other users may read
is refused (when the configuration is loaded and at each read), with the ``chmod`` that
fixes it.
"""
from __future__ import annotations

import base64
import contextlib
import ipaddress
import json
import logging
import os
import re
import shlex
import smtplib
import socket
import ssl
import time
import uuid
from dataclasses import dataclass, field
from datetime import datetime
from email.utils import parseaddr
from pathlib import Path
from typing import Any, Callable, Iterable

from alerts.mail.forms import forms_from_config
from alerts.mail.message import build_email, clean_header
from alerts.rules import parse_duration
from alerts.transactions import transaction

log = logging.getLogger(__name__)

OUTBOX = "outbox"
FINAL = ("sent", "expired")

Clock = Callable[[], float]


def _wall(clock: Clock | None) -> int:
    """Wall-clock Unix seconds from ``clock`` (default ``time.time``)."""
    return int((clock or time.time)())


# --------------------------------------------------------------------------- helpers

def unix_seconds(t: Any = None) -> int:
    """Unix seconds UTC [s] from None (now), a number [s], an aware datetime or a pandas Timestamp."""
    if t is None:
        return int(time.time())
    if isinstance(t, (int, float)):
        return int(t)
    if hasattr(t, "timestamp"):
        if isinstance(t, datetime) and t.tzinfo is None:
            raise ValueError("naive datetime: give a time zone (UTC)")
        return int(t.timestamp())
    raise TypeError(f"not a time: {t!r}")


def ensure_outbox_schema(db) -> None:
    """Create the ``outbox`` table and its indexes if missing."""
    if OUTBOX not in db.table_names():
        db[OUTBOX].create({
            "id": int, "created_at": int, "kind": str, "key": str, "recipient": str,
            "subject": str, "text": str, "html": str, "attachments": str, "message_id": str,
            "status": str, "attempts": int, "next_try": int, "claimed_until": int,
            "last_try": int, "last_error": str, "sent_at": int, "expired_at": int, "event_at": int,
            "claimed_by": str,
        }, pk="id", not_null={"created_at", "kind", "key", "recipient", "subject", "text",
                              "message_id", "status"}, defaults={"status": "pending", "attempts": 0},
            if_not_exists=True)
        db[OUTBOX].create_index(["key", "recipient"], unique=True, if_not_exists=True)
        db[OUTBOX].create_index(["status", "recipient", "id"], if_not_exists=True)
    cols = db[OUTBOX].columns_dict
    if "event_at" not in cols:
        # stores queued before the wall-clock split kept the event's time as the queue time
        db[OUTBOX].add_column("event_at", int)
    if "claimed_by" not in cols:
        # who holds a 'sending' claim (see process_identity); empty in older stores
        db[OUTBOX].add_column("claimed_by", str)


# --------------------------------------------------------------------------- claims

def _start_ticks(pid: int) -> str | None:
    """When process ``pid`` started (clock ticks since boot, from /proc), or None."""
    try:
        with open(f"/proc/{pid}/stat", "rb") as fh:
            stat = fh.read()
    except OSError:
        return None
    # the command name (field 2) may hold spaces and parentheses: count from the last ')'
    fields = stat[stat.rfind(b")") + 2:].split()
    return fields[19].decode() if len(fields) > 19 else None


def process_identity(role: str = "daemon") -> str:
    """``ROLE:HOST:PID:START`` naming this process as the holder of outbox claims.

    The start time tells a process from a later one that got the same pid."""
    pid = os.getpid()
    return f"{role}:{socket.gethostname()}:{pid}:{_start_ticks(pid) or '-'}"


def _holder_alive(holder: str) -> bool | None:
    """Whether the process named by :func:`process_identity` runs; None when it is on
    another host (or the name cannot be read), so cannot be told."""
    try:
        _role, host, pid_text, start = holder.split(":")
        pid = int(pid_text)
    except ValueError:
        return None
    if host != socket.gethostname():
        return None
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        pass  # another user's process with that pid exists
    now_start = _start_ticks(pid)
    return not (start != "-" and now_start is not None and now_start != start)


def take_over_claims(db, *, holds_store_lock: bool, now: Any = None, clock: Clock | None = None) -> list[int]:
    """Release the ``sending`` claims of processes that are gone, due at once (``now`` [Unix s,
    UTC] or ``clock()`` [Unix s], the wall clock by default).

    A daemon calls this as it starts. With ``holds_store_lock`` (the one-daemon lock is
    ours) every claim made by a daemon -- or by a version that did not name its claims --
    belongs to a dead predecessor; any other claim is released when its process is known
    to be gone. The rows go back to ``pending`` with their Message-ID unchanged: the
    message may have reached the server before the kill, and a resend is recognisable as
    the same message (at least once, never lost).

    Returns
    -------
    list of int
        The outbox ids taken over.
    """
    ensure_outbox_schema(db)
    t = unix_seconds(now) if now is not None else _wall(clock)
    rows = list(db.query("SELECT id, claimed_by FROM outbox WHERE status = 'sending'"))
    taken: list[int] = []
    for r in rows:
        holder = r["claimed_by"]
        daemon_claim = holder is None or holder.startswith("daemon:")
        if not ((holds_store_lock and daemon_claim) or (holder is not None and _holder_alive(holder) is False)):
            continue
        with transaction(db):
            cur = db.conn.execute(
                "UPDATE outbox SET status = 'pending', claimed_until = NULL, claimed_by = NULL, next_try = ?"
                " WHERE id = ? AND status = 'sending' AND claimed_by IS ?", (t, r["id"], holder))
        if cur.rowcount == 1:
            taken.append(r["id"])
    if taken:
        log.warning("outbox: %d message(s) were being sent when a previous run stopped (ids %s); sending "
                    "them again now with the same Message-ID", len(taken), ", ".join(map(str, taken)))
    return taken


def _make_message_id(kind: str) -> str:
    host = re.sub(r"[^A-Za-z0-9.-]", "", socket.gethostname()) or "localhost"
    kind = re.sub(r"[^A-Za-z0-9-]", "", kind)[:20] or "msg"
    return f"<{uuid.uuid4().hex}.{kind}@{host}.quaywatch>"


def _encode_attachments(attachments: Iterable[Any] | None) -> str | None:
    if not attachments:
        return None
    out = []
    for att in attachments:
        if isinstance(att, (str, Path)):
            p = Path(att)
            name, data = p.name, p.read_bytes()
            ctype = {".html": "text/html", ".png": "image/png", ".csv": "text/csv",
                     ".pdf": "application/pdf", ".txt": "text/plain"}.get(p.suffix.lower(),
                                                                           "application/octet-stream")
        elif isinstance(att, dict):
            name, data, ctype = att["filename"], att["data"], att.get("content_type")
            cid = att.get("content_id") or att.get("cid")
        else:
            name, data, ctype, *rest = att
            cid = rest[0] if rest else None
        if isinstance(data, str):
            data = data.encode("utf-8")
        item = {"filename": str(name), "content_type": ctype or "application/octet-stream",
                "data": base64.b64encode(data).decode("ascii")}
        if cid:
            # build_email cites inline report charts by it (multipart/related)
            item["content_id"] = str(cid)
        out.append(item)
    return json.dumps(out)


def _decode_attachments(text: str | None) -> list[dict]:
    """Attachments as stored: dicts of filename, content_type, data (bytes), content_id if any."""
    if not text:
        return []
    return [dict(a, data=base64.b64decode(a["data"])) for a in json.loads(text)]


def enqueue(db, recipients: Iterable[str], subject: str, text: str, html: str | None, kind: str,
            key: str, attachments: Iterable[Any] | None = None, now: Any = None, *,
            event_time: Any = None, clock: Clock | None = None) -> list[int]:
    """Queue one message for each recipient; idempotent per (``key``, recipient).

    Parameters
    ----------
    db : sqlite_utils.Database
    recipients : iterable of str
        Addresses; one outbox row (and one Message-ID) each.
    subject, text, html : str
        Already composed; ``html`` may be None for plain text only.
    kind : str
        What this is, for listing: ``alert``, ``all_clear``, ``report``, ``test``...
    key : str
        Caller's identity for the message; queuing the same key to the same recipient
        again does nothing, so a retried job cannot queue a duplicate.
    attachments : iterable, optional
        Paths, ``(filename, bytes, content_type[, content_id])`` tuples or dicts with those
        keys; ``content_id`` is kept (inline images cited by the HTML as ``cid:``).
    now : time, optional
        Former name of ``event_time``, kept for callers that pass the time they run at.
    event_time : time, optional
        Data time of the event the message is about [Unix s or datetime] (a replayed clock
        may be years back). Recorded as ``event_at``; never used for delivery.
    clock : callable, optional
        Wall clock giving Unix seconds (default ``time.time``): the queue time, from which
        back-off and expiry count.

    Returns
    -------
    list of int
        Outbox ids of the rows added (rows already queued under the key are not repeated).
    """
    ensure_outbox_schema(db)
    t = _wall(clock)
    ev = event_time if event_time is not None else now
    event_at = unix_seconds(ev) if ev is not None else t
    att = _encode_attachments(attachments)
    ids: list[int] = []
    with transaction(db):
        for rcpt in dict.fromkeys(r.strip() for r in recipients if r and r.strip()):
            cur = db.conn.execute(
                "INSERT OR IGNORE INTO outbox (created_at, kind, key, recipient, subject, text, html,"
                " attachments, message_id, status, attempts, next_try, event_at) "
                "VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, 'pending', 0, ?, ?)",
                (t, kind, key, rcpt, subject, text, html, att, _make_message_id(kind), t, event_at))
            if cur.rowcount == 1:
                ids.append(cur.lastrowid)
    return ids


# --------------------------------------------------------------------------- settings

@dataclass(frozen=True)
class MailSettings:
    """Validated mail settings. Holds where the password is, never the password."""

    sender: str
    host: str | None = None
    port: int = 587
    security: str = "starttls"
    user: str | None = None
    password_env: str | None = None
    password_file: str | None = None
    timeout: float = 30.0
    retry_first: float = 60.0
    retry_max: float = 1800.0
    give_up_after: float = 2 * 86400.0
    reply_to: str | None = None
    save_dir: str | None = None
    ca_file: str | None = None
    forms: tuple = ()  # (address, form name) pairs, see alerts.mail.forms

    def password(self) -> str | None:
        """Read the password now, from the environment or the file (never stored)."""
        if self.password_env:
            value = os.environ.get(self.password_env)
            if value is None:
                raise RuntimeError(f"environment variable {self.password_env} is not set")
            return value
        if self.password_file:
            problem = password_file_problem(self.password_file)
            if problem:
                raise RuntimeError(f"password file {problem}")
            try:
                return Path(self.password_file).read_text(encoding="utf-8").rstrip("\r\n")
            except OSError as exc:
                raise RuntimeError(f"cannot read password file {self.password_file}: {exc.strerror}") from None
        return None

    def backoff(self, attempts: int) -> float:
        """Wait [s] after the ``attempts``-th failure (doubling from ``retry_first``, capped at ``retry_max``)."""
        return min(self.retry_max, self.retry_first * 2 ** max(0, attempts - 1))


def password_file_problem(path: str | os.PathLike) -> str | None:
    """Why a password file must not be used, or None: a file other users may read (or
    write) is refused, as ssh refuses such a private key, with the command that fixes it.

    The file's owner and group keep their access (a daemon user may read it through its
    group); a missing file is not a problem here (it is reported when the password is read).
    """
    try:
        mode = os.stat(path).st_mode  # through a symbolic link: the file that is read
    except OSError:
        return None
    if mode & 0o007:
        what = "readable" if mode & 0o004 else "open"
        return (f"{path}: {what} by other users (mode {mode & 0o777:04o}); a password must not be; "
                f"fix it with: chmod o-rwx {shlex.quote(os.fspath(path))}")
    return None


_LOOPBACK_NAMES = {"localhost", "localhost.localdomain", "ip6-localhost"}


def _is_loopback(host: str) -> bool:
    if host.lower() in _LOOPBACK_NAMES:
        return True
    try:
        return ipaddress.ip_address(host).is_loopback
    except ValueError:
        return False


def mail_settings_from(raw: Any, keypath: str) -> tuple[MailSettings | None, list[str]]:
    """Validate the mail settings table.

    Returns
    -------
    settings : MailSettings or None
        None when there are errors.
    errors : list of str
        Each starts with the key path.
    """
    if not isinstance(raw, dict):
        return None, [f"{keypath}: expected a table of mail settings"]
    errors: list[str] = []
    known = {"sender", "host", "port", "security", "user", "password_env", "password_file",
             "timeout", "retry_first", "retry_max", "give_up_after", "reply_to", "save_dir",
             "ca_file", "forms"}
    for key in raw:
        if key not in known:
            errors.append(f"{keypath}.{key}: unknown key (known: {', '.join(sorted(known))})")

    def text(key: str, required: bool = False) -> str | None:
        v = raw.get(key)
        if v is None:
            if required:
                errors.append(f"{keypath}.{key}: required")
            return None
        if not isinstance(v, str) or not v.strip() or clean_header(v) != v.strip():
            errors.append(f"{keypath}.{key}: expected a single line of text, got {v!r}")
            return None
        return v.strip()

    sender = text("sender", required=True)
    if sender and "@" not in parseaddr(sender)[1]:
        errors.append(f"{keypath}.sender: not an email address: {sender!r}")
    reply_to = text("reply_to")
    if reply_to and "@" not in parseaddr(reply_to)[1]:
        errors.append(f"{keypath}.reply_to: not an email address: {reply_to!r}")
    host = text("host")
    save_dir = text("save_dir")
    ca_file = text("ca_file")
    if host is None and save_dir is None:
        errors.append(f"{keypath}.host: required (or save_dir, to only keep messages as files)")
    security = raw.get("security", "starttls")
    if security not in ("starttls", "tls", "none"):
        errors.append(f"{keypath}.security: one of starttls, tls, none (got {security!r})")
        security = "starttls"
    if security == "none" and host and not _is_loopback(host):
        errors.append(f"{keypath}.security: 'none' sends in clear text; only allowed to a loopback "
                      f"host (127.0.0.1, localhost), not {host!r}")
    port = raw.get("port", {"starttls": 587, "tls": 465, "none": 25}[security])
    if isinstance(port, bool) or not isinstance(port, int) or not 0 < port < 65536:
        errors.append(f"{keypath}.port: expected a port number, got {port!r}")
        port = 587
    user = text("user")
    penv, pfile = text("password_env"), text("password_file")
    if penv and pfile:
        errors.append(f"{keypath}.password_file: give password_env or password_file, not both")
    if user and not (penv or pfile):
        errors.append(f"{keypath}.user: a user needs password_env or password_file")
    if (penv or pfile) and not user:
        errors.append(f"{keypath}.user: required with a password")
    if ca_file and security == "none":
        errors.append(f"{keypath}.ca_file: only used with security starttls or tls")
    if (penv or pfile) and security == "none":
        errors.append(f"{keypath}.security: a password is never sent without TLS; use starttls or tls")
    if penv and not re.fullmatch(r"[A-Za-z_][A-Za-z0-9_]*", penv):
        errors.append(f"{keypath}.password_env: the name of an environment variable, got {penv!r}")
    durations = {}
    for key, default in (("timeout", 30.0), ("retry_first", 60.0), ("retry_max", 1800.0),
                         ("give_up_after", 2 * 86400.0)):
        try:
            durations[key] = parse_duration(raw[key]) if key in raw else default
        except ValueError as exc:
            errors.append(f"{keypath}.{key}: {exc}")
            durations[key] = default
        if durations[key] <= 0:
            errors.append(f"{keypath}.{key}: must be more than zero")
    if durations["retry_max"] < durations["retry_first"]:
        errors.append(f"{keypath}.retry_max: shorter than retry_first")
    forms, form_errors = forms_from_config(raw.get("forms"), f"{keypath}.forms")
    errors += form_errors
    if errors:
        return None, errors
    return MailSettings(sender=sender, host=host, port=port, security=security, user=user,
                        password_env=penv, password_file=pfile, reply_to=reply_to,
                        save_dir=save_dir, ca_file=ca_file, forms=tuple(sorted(forms.items())),
                        **durations), []


# --------------------------------------------------------------------------- delivery

@dataclass
class DeliverySummary:
    """What one delivery round did. Ids are outbox ids."""

    sent: list[int] = field(default_factory=list)
    retrying: list[tuple[int, str]] = field(default_factory=list)
    expired: list[int] = field(default_factory=list)
    waiting: int = 0


class _ConnectionFailed(Exception):
    """The server could not be reached or refused the session: stop this round."""


class _Sender:
    """A lazily opened SMTP session (or the save-only transport)."""

    def __init__(self, settings: MailSettings):
        self.s = settings
        self.smtp: smtplib.SMTP | None = None

    def _open(self) -> smtplib.SMTP:
        s = self.s
        password: str | None = None
        smtp: smtplib.SMTP | None = None
        try:
            if s.security == "tls":
                smtp = smtplib.SMTP_SSL(s.host, s.port, timeout=s.timeout, context=_tls_context(s))
            else:
                smtp = smtplib.SMTP(s.host, s.port, timeout=s.timeout)
                if s.security == "starttls":
                    # starttls() raises when the server does not offer it: never a silent
                    # fall-back to clear text
                    smtp.starttls(context=_tls_context(s))
            if s.user:
                password = s.password() or ""
                smtp.login(s.user, password)
        except (OSError, smtplib.SMTPException, RuntimeError, ssl.SSLError) as exc:
            if smtp is not None:
                with contextlib.suppress(Exception):
                    smtp.close()
            reason = _scrub(_describe(exc), password)
            raise _ConnectionFailed(f"{s.host}:{s.port}: {reason}") from None
        return smtp

    def send(self, msg, sender_addr: str, recipient: str) -> None:
        if self.s.host is None:
            return
        if self.smtp is None:
            self.smtp = self._open()
        try:
            self.smtp.send_message(msg, from_addr=sender_addr, to_addrs=[recipient])
        except (smtplib.SMTPServerDisconnected, OSError) as exc:
            self.smtp = None
            raise _ConnectionFailed(f"{self.s.host}:{self.s.port}: {_describe(exc)}") from None

    def close(self) -> None:
        if self.smtp is not None:
            with contextlib.suppress(Exception):
                self.smtp.quit()
            self.smtp = None


def _tls_context(s: MailSettings) -> ssl.SSLContext:
    """A verifying client context: the system trust store, or only ``ca_file`` if set."""
    if s.ca_file is None:
        return ssl.create_default_context()
    try:
        return ssl.create_default_context(cafile=s.ca_file)
    except FileNotFoundError:
        raise RuntimeError(f"mail.ca_file {s.ca_file}: no such file") from None
    except OSError as exc:
        raise RuntimeError(f"mail.ca_file {s.ca_file}: cannot read it ({exc.strerror})") from None
    except ssl.SSLError:
        raise RuntimeError(f"mail.ca_file {s.ca_file}: not a PEM file of CA certificates") from None


def _scrub(text: str, password: str | None) -> str:
    """``text`` with the password replaced by ``***`` (a server may echo what it got)."""
    return text.replace(password, "***") if password else text


def _describe(exc: BaseException) -> str:
    if isinstance(exc, ssl.SSLCertVerificationError):
        why = exc.verify_message or exc.reason or str(exc)
        return (f"server certificate not trusted ({why}); the server must present a certificate "
                f"for this host signed by a trusted CA (see mail.ca_file)")
    if isinstance(exc, smtplib.SMTPResponseException):
        msg = exc.smtp_error.decode("utf-8", "replace") if isinstance(exc.smtp_error, bytes) else str(exc.smtp_error)
        return f"{exc.smtp_code} {clean_header(msg, 200)}"
    if isinstance(exc, smtplib.SMTPRecipientsRefused):
        return "recipient refused: " + "; ".join(
            f"{r}: {c} {m.decode('utf-8', 'replace') if isinstance(m, bytes) else m}"
            for r, (c, m) in exc.recipients.items())
    return clean_header(f"{type(exc).__name__}: {exc}", 200)


def _save_copy(settings: MailSettings, row: dict, msg) -> None:
    d = Path(settings.save_dir)
    d.mkdir(parents=True, exist_ok=True)
    kind = re.sub(r"[^A-Za-z0-9_-]", "", row["kind"]) or "msg"
    (d / f"{row['id']:06d}-{kind}.eml").write_bytes(msg.as_bytes())


def deliver_due(db, settings: MailSettings, now: Any = None, *,
                recipients: Iterable[str] | None = None, clock: Clock | None = None,
                claimer: str | None = None) -> DeliverySummary:
    """Send what is due from the outbox, in order per recipient.

    Parameters
    ----------
    db : sqlite_utils.Database
    settings : MailSettings
    now : time, optional
        The round's wall-clock time [Unix s] (default: ``clock()``); decides back-off and
        expiry. Never a data or replay time: delivery happens in the real world.
    recipients : iterable of str, optional
        Only these recipients' queues (the test-mail command uses this).
    clock : callable, optional
        Wall clock giving Unix seconds (default ``time.time``).
    claimer : str, optional
        Who claims the rows it sends (default :func:`process_identity` ``("cli")``; the
        daemon passes its own).

    Returns
    -------
    DeliverySummary
        Ids sent, ids failed this round with the reason, ids expired, rows still waiting.
    """
    ensure_outbox_schema(db)
    t = unix_seconds(now) if now is not None else _wall(clock)
    only = set(recipients) if recipients is not None else None
    summary = DeliverySummary()
    claimer = claimer or process_identity("cli")

    rows = [dict(r) for r in db.query(
        "SELECT * FROM outbox WHERE status NOT IN ('sent', 'expired') ORDER BY id")]
    if only is not None:
        rows = [r for r in rows if r["recipient"] in only]

    # Expiry first, so an expired head of a queue does not block the rest.
    live = []
    for r in rows:
        if r["created_at"] + settings.give_up_after <= t and not (
                r["status"] == "sending" and (r["claimed_until"] or 0) > t):
            with transaction(db):
                db.conn.execute("UPDATE outbox SET status = 'expired', expired_at = ? WHERE id = ?"
                                " AND status NOT IN ('sent', 'expired')", (t, r["id"]))
            log.error("outbox %d to %s expired undelivered after %d attempts (last error: %s): %s",
                      r["id"], r["recipient"], r["attempts"] or 0, r["last_error"] or "none",
                      r["subject"])
            summary.expired.append(r["id"])
        else:
            live.append(r)

    sender_addr = parseaddr(settings.sender)[1]
    transport = _Sender(settings)
    blocked: set[str] = set()
    lease = int(settings.timeout * 4) + 60
    try:
        for r in live:
            if r["recipient"] in blocked:
                summary.waiting += 1
                continue
            busy = r["status"] == "sending" and (r["claimed_until"] or 0) > t
            if busy or (r["next_try"] or 0) > t:
                blocked.add(r["recipient"])
                summary.waiting += 1
                continue
            # Claim the row before talking to the server; another process holding a live
            # lease keeps it.
            with transaction(db):
                cur = db.conn.execute(
                    "UPDATE outbox SET status = 'sending', claimed_until = ?, claimed_by = ?, last_try = ?"
                    " WHERE id = ? AND (status = 'pending' OR (status = 'sending' AND"
                    " COALESCE(claimed_until, 0) <= ?))", (t + lease, claimer, t, r["id"], t))
            if cur.rowcount != 1:
                blocked.add(r["recipient"])
                summary.waiting += 1
                continue
            msg = build_email(settings.sender, r["recipient"], r["subject"], r["text"], r["html"],
                              r["message_id"], date=r["created_at"], reply_to=settings.reply_to,
                              attachments=_decode_attachments(r["attachments"]))
            try:
                transport.send(msg, sender_addr, r["recipient"])
                if settings.save_dir:
                    _save_copy(settings, r, msg)
            except _ConnectionFailed as exc:
                _failed(db, settings, r, t, str(exc), summary)
                blocked.add(r["recipient"])
                break  # the server is unreachable: the rest waits for the next round
            except (smtplib.SMTPException, OSError) as exc:
                _failed(db, settings, r, t, _describe(exc), summary)
                blocked.add(r["recipient"])
                continue
            with transaction(db):
                db.conn.execute("UPDATE outbox SET status = 'sent', sent_at = ?, claimed_until = NULL,"
                                " claimed_by = NULL,"
                                " attempts = COALESCE(attempts, 0) + 1, last_error = NULL WHERE id = ?",
                                (t, r["id"]))
            log.info("outbox %d sent to %s: %s", r["id"], r["recipient"], r["subject"])
            summary.sent.append(r["id"])
    finally:
        transport.close()
    return summary


def _failed(db, settings: MailSettings, r: dict, t: int, reason: str, summary: DeliverySummary) -> None:
    attempts = (r["attempts"] or 0) + 1
    nxt = t + int(settings.backoff(attempts))
    with transaction(db):
        db.conn.execute("UPDATE outbox SET status = 'pending', claimed_until = NULL, claimed_by = NULL,"
                        " attempts = ?,"
                        " next_try = ?, last_error = ? WHERE id = ?", (attempts, nxt, reason, r["id"]))
    log.warning("outbox %d to %s not delivered (attempt %d, next try in %ds): %s",
                r["id"], r["recipient"], attempts, nxt - t, reason)
    summary.retrying.append((r["id"], reason))


def list_outbox(db, limit: int = 50, status: str | None = None) -> list[dict]:
    """Most recent outbox rows first (without bodies), optionally of one status."""
    if OUTBOX not in db.table_names():
        return []
    where, params = ("WHERE status = ?", [status]) if status else ("", [])
    return [dict(r) for r in db.query(
        f"SELECT id, created_at, kind, recipient, subject, status, attempts, next_try, last_error,"
        f" sent_at, expired_at, message_id FROM outbox {where} ORDER BY id DESC LIMIT ?",
        params + [limit])]


def outbox_row(db, outbox_id: int) -> dict | None:
    """One outbox row (without the password, which is never stored)."""
    rows = list(db.query("SELECT * FROM outbox WHERE id = ?", [outbox_id]))
    return dict(rows[0]) if rows else None
