"""SMTP delivery over TLS with authentication (alerts/mail/outbox.py), against real aiosmtpd
servers on loopback using throwaway certificates from ``trustme``.

References for the behaviour checked here:
- RFC 3207 (SMTP STARTTLS): the client upgrades the session, and a server may refuse
  mail until it has (aiosmtpd ``require_starttls``).
- RFC 8314 (implicit TLS for mail submission, port 465): TLS from the first byte.
- RFC 4954 (SMTP AUTH) and RFC 4616 (PLAIN): credentials go only over TLS here
  (aiosmtpd ``auth_require_tls``); a failed login is answered with 535.
- RFC 6125 / Python ``ssl`` documentation: the client checks the certificate chain and the
  host name; an untrusted certificate fails the handshake.
"""
from __future__ import annotations

import email
import logging
import socket
import ssl
from email import policy

import pytest
import sqlite_utils
import trustme
from aiosmtpd.controller import Controller
from aiosmtpd.smtp import AuthResult, LoginPassword

from alerts.mail.outbox import deliver_due, enqueue, mail_settings_from, outbox_row
from units import minute

# aiosmtpd warns when AUTH is allowed without *its* STARTTLS; the implicit-TLS servers
# below are encrypted from the first byte, so the warning does not apply to them
pytestmark = pytest.mark.filterwarnings("ignore:Requiring AUTH while not requiring TLS:UserWarning")

T0 = 1_761_220_800  # 2025-10-23 12:00 UTC
USER = "gauge"
PASSWORD = "tide-Secret-4471"   # invented; must never leave the process except to the server
WRONG = "harbour-Wrong-9902"   # invented; the configured password in the failure tests
PW_ENV = "QW_TLS_TEST_PASSWORD"


class TlsCatcher:
    """aiosmtpd handler keeping each accepted message and whether it came over TLS."""

    def __init__(self):
        self.messages = []

    async def handle_DATA(self, server, session, envelope):
        msg = email.message_from_bytes(envelope.content, policy=policy.default)
        over_tls = server.transport.get_extra_info("ssl_object") is not None
        self.messages.append((tuple(envelope.rcpt_tos), msg, over_tls, session.login_data))
        return "250 OK"


class Authenticator:
    """Accepts USER/PASSWORD; records every (login, password) offered."""

    def __init__(self, echo_password_on_failure: bool = False):
        self.seen: list[tuple[str, str]] = []
        self.echo = echo_password_on_failure

    def __call__(self, server, session, envelope, mechanism, auth_data):
        assert isinstance(auth_data, LoginPassword)
        login, pw = auth_data.login.decode(), auth_data.password.decode()
        self.seen.append((login, pw))
        if (login, pw) == (USER, PASSWORD):
            return AuthResult(success=True, auth_data=auth_data)
        if self.echo:
            # a careless server quoting what it was given back in its reply
            return AuthResult(success=False, handled=False,
                              message=f"535 5.7.8 bad credentials {login}/{pw}")
        return AuthResult(success=False, handled=False)


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


@pytest.fixture(scope="module")
def ca():
    return trustme.CA()


@pytest.fixture(scope="module")
def server_ctx(ca):
    ctx = ssl.create_default_context(ssl.Purpose.CLIENT_AUTH)
    ca.issue_cert("127.0.0.1", "localhost").configure_cert(ctx)
    return ctx


@pytest.fixture
def ca_file(ca, tmp_path):
    path = tmp_path / "test-ca.pem"
    ca.cert_pem.write_to_path(str(path))
    return str(path)


@pytest.fixture
def db(tmp_path):
    d = sqlite_utils.Database(tmp_path / "store.sqlite")
    d.enable_wal()
    return d


@pytest.fixture
def password_env(monkeypatch):
    monkeypatch.setenv(PW_ENV, PASSWORD)
    return PW_ENV


def start(ctl):
    ctl.start()
    return ctl


@pytest.fixture
def starttls_server(server_ctx):
    """STARTTLS required before anything else; AUTH offered only over TLS and required."""
    catcher, auth, port = TlsCatcher(), Authenticator(), free_port()
    ctl = start(Controller(catcher, hostname="127.0.0.1", port=port, server_hostname="localhost",
                           tls_context=server_ctx, require_starttls=True,
                           authenticator=auth, auth_required=True, auth_require_tls=True))
    yield catcher, auth, port
    ctl.stop()


@pytest.fixture
def implicit_tls_server(server_ctx):
    """TLS from the first byte (RFC 8314); AUTH required."""
    catcher, auth, port = TlsCatcher(), Authenticator(), free_port()
    # auth_require_tls off: aiosmtpd counts only a STARTTLS upgrade as TLS, and this
    # session is encrypted from its first byte
    ctl = start(Controller(catcher, hostname="127.0.0.1", port=port, server_hostname="localhost",
                           ssl_context=server_ctx, authenticator=auth, auth_required=True,
                           auth_require_tls=False))
    yield catcher, auth, port
    ctl.stop()


def at(t):
    """An injected wall clock standing at ``t`` [Unix s]."""
    return lambda: t


def settings(port, security, **extra):
    raw = {"sender": "Quay monitor <gauge@port.example>", "host": "127.0.0.1", "port": port,
           "security": security, "user": USER, "timeout": "4s", "retry_first": "1min",
           "retry_max": "10min", "give_up_after": "6h"}
    raw.update(extra)
    s, errors = mail_settings_from(raw, "mail")
    assert errors == []
    return s


def queue_one(db, subject="surge alert"):
    [oid] = enqueue(db, ["duty@port.example"], subject, "plain body", None, "alert", "k-" + subject,
                    clock=at(T0))
    return oid


# --------------------------------------------------------------------------- STARTTLS

def test_starttls_with_login_delivers_over_tls(db, starttls_server, ca_file, password_env):
    catcher, auth, port = starttls_server
    oid = queue_one(db)
    summary = deliver_due(db, settings(port, "starttls", password_env=password_env, ca_file=ca_file),
                          clock=at(T0))
    assert summary.sent == [oid]
    [(rcpt, msg, over_tls, login)] = catcher.messages
    assert (rcpt, msg["Subject"], over_tls, login) == (("duty@port.example",), "surge alert", True, b"gauge")


def test_starttls_server_saw_the_configured_credentials(db, starttls_server, ca_file, password_env):
    _, auth, port = starttls_server
    queue_one(db)
    deliver_due(db, settings(port, "starttls", password_env=password_env, ca_file=ca_file), clock=at(T0))
    assert auth.seen == [(USER, PASSWORD)]


def test_password_file_works_the_same_way(db, starttls_server, ca_file, tmp_path):
    catcher, auth, port = starttls_server
    (tmp_path / "pw").write_text(PASSWORD + "\n")
    (tmp_path / "pw").chmod(0o600)
    oid = queue_one(db)
    summary = deliver_due(db, settings(port, "starttls", password_file=str(tmp_path / "pw"), ca_file=ca_file),
                          clock=at(T0))
    assert summary.sent == [oid] and auth.seen == [(USER, PASSWORD)]


# --------------------------------------------------------------------------- implicit TLS

def test_implicit_tls_with_login_delivers(db, implicit_tls_server, ca_file, password_env):
    catcher, auth, port = implicit_tls_server
    oid = queue_one(db)
    summary = deliver_due(db, settings(port, "tls", password_env=password_env, ca_file=ca_file), clock=at(T0))
    assert summary.sent == [oid]
    [(_, msg, over_tls, _)] = catcher.messages
    assert over_tls and auth.seen == [(USER, PASSWORD)]


# --------------------------------------------------------------------------- wrong password

def wrong_password_round(db, port, ca_file, monkeypatch, caplog, echo=False):
    monkeypatch.setenv(PW_ENV, WRONG)
    oid = queue_one(db)
    caplog.set_level(logging.DEBUG)
    summary = deliver_due(db, settings(port, "starttls", password_env=PW_ENV, ca_file=ca_file), clock=at(T0))
    return oid, summary


def our_log(caplog) -> str:
    """Log text from the monitor's own loggers (not the test server's, which logs its input)."""
    return "\n".join(r.getMessage() for r in caplog.records if not r.name.startswith("mail.log"))


def test_wrong_password_leaves_the_message_queued_with_back_off(db, starttls_server, ca_file, monkeypatch, caplog):
    catcher, _, port = starttls_server
    oid, summary = wrong_password_round(db, port, ca_file, monkeypatch, caplog)
    row = outbox_row(db, oid)
    assert summary.sent == [] and catcher.messages == []
    assert (row["status"], row["attempts"], row["next_try"]) == ("pending", 1, T0 + 1 * minute)
    assert "535" in row["last_error"]


def test_wrong_password_is_retried_and_the_back_off_doubles(db, starttls_server, ca_file, monkeypatch, caplog):
    _, auth, port = starttls_server
    oid, _ = wrong_password_round(db, port, ca_file, monkeypatch, caplog)
    s = settings(port, "starttls", password_env=PW_ENV, ca_file=ca_file)
    tried = len(auth.seen)   # smtplib offers each AUTH mechanism the server lists
    assert deliver_due(db, s, clock=at(T0 + 30)).retrying == [] and len(auth.seen) == tried  # backing off
    deliver_due(db, s, clock=at(T0 + minute))
    row = outbox_row(db, oid)
    assert (row["attempts"], row["next_try"]) == (2, T0 + 3 * minute) and len(auth.seen) > tried


def test_wrong_password_never_appears_in_store_logs_or_error(db, starttls_server, ca_file, monkeypatch, caplog):
    _, auth, port = starttls_server
    oid, summary = wrong_password_round(db, port, ca_file, monkeypatch, caplog)
    stored = " ".join(str(v) for r in db.query("SELECT * FROM outbox") for v in r.values())
    reasons = " ".join(reason for _, reason in summary.retrying)
    assert (USER, WRONG) in auth.seen          # it was really sent, to the server only
    for place in (stored, our_log(caplog), reasons):
        assert WRONG not in place and PASSWORD not in place


def test_a_server_echoing_the_password_has_it_scrubbed(db, server_ctx, ca_file, monkeypatch, caplog):
    auth, port = Authenticator(echo_password_on_failure=True), free_port()
    ctl = start(Controller(TlsCatcher(), hostname="127.0.0.1", port=port, server_hostname="localhost",
                           tls_context=server_ctx, require_starttls=True, authenticator=auth,
                           auth_required=True, auth_require_tls=True))
    try:
        oid, summary = wrong_password_round(db, port, ca_file, monkeypatch, caplog)
    finally:
        ctl.stop()
    error = outbox_row(db, oid)["last_error"]
    assert "bad credentials gauge/***" in error
    assert WRONG not in error and WRONG not in our_log(caplog)


# --------------------------------------------------------------------------- untrusted certificate

def test_certificate_from_an_unknown_ca_is_refused_by_default(db, starttls_server, password_env):
    # no ca_file: the system trust store, which does not hold the test CA
    catcher, auth, port = starttls_server
    oid = queue_one(db)
    summary = deliver_due(db, settings(port, "starttls", password_env=password_env), clock=at(T0))
    row = outbox_row(db, oid)
    assert summary.sent == [] and catcher.messages == [] and auth.seen == []
    assert (row["status"], row["attempts"]) == ("pending", 1)
    assert "server certificate not trusted" in row["last_error"]


def test_certificate_signed_by_another_ca_is_refused_over_implicit_tls(db, implicit_tls_server, tmp_path,
                                                                      password_env):
    catcher, auth, port = implicit_tls_server
    other = tmp_path / "other-ca.pem"
    trustme.CA().cert_pem.write_to_path(str(other))
    oid = queue_one(db)
    deliver_due(db, settings(port, "tls", password_env=password_env, ca_file=str(other)), clock=at(T0))
    row = outbox_row(db, oid)
    assert catcher.messages == [] and auth.seen == []
    assert row["status"] == "pending" and "server certificate not trusted" in row["last_error"]


def test_certificate_for_another_host_name_is_refused(db, ca, ca_file, password_env):
    ctx = ssl.create_default_context(ssl.Purpose.CLIENT_AUTH)
    ca.issue_cert("smtp.elsewhere.example").configure_cert(ctx)
    catcher, auth, port = TlsCatcher(), Authenticator(), free_port()
    ctl = start(Controller(catcher, hostname="127.0.0.1", port=port, server_hostname="localhost",
                           ssl_context=ctx, authenticator=auth, auth_required=True,
                           auth_require_tls=False))
    try:
        oid = queue_one(db)
        deliver_due(db, settings(port, "tls", password_env=password_env, ca_file=ca_file), clock=at(T0))
    finally:
        ctl.stop()
    assert catcher.messages == [] and auth.seen == []
    assert "server certificate not trusted" in outbox_row(db, oid)["last_error"]


def test_untrusted_message_is_delivered_once_the_ca_is_configured(db, starttls_server, ca_file, password_env):
    catcher, _, port = starttls_server
    oid = queue_one(db)
    deliver_due(db, settings(port, "starttls", password_env=password_env), clock=at(T0))
    summary = deliver_due(db, settings(port, "starttls", password_env=password_env, ca_file=ca_file),
                          clock=at(T0 + minute))
    assert summary.sent == [oid] and len(catcher.messages) == 1


# --------------------------------------------------------------------------- settings

def test_missing_ca_file_is_a_recorded_error_naming_the_key(db, starttls_server, tmp_path, password_env):
    _, _, port = starttls_server
    oid = queue_one(db)
    deliver_due(db, settings(port, "starttls", password_env=password_env, ca_file=str(tmp_path / "none.pem")),
                clock=at(T0))
    row = outbox_row(db, oid)
    assert row["status"] == "pending" and "mail.ca_file" in row["last_error"]


def test_ca_file_without_tls_is_a_settings_error():
    _, errors = mail_settings_from({"sender": "g@port.example", "host": "127.0.0.1", "security": "none",
                                    "ca_file": "ca.pem"}, "mail")
    assert [e.split(":")[0] for e in errors] == ["mail.ca_file"]


# --------------------------------------------------------------------------- no downgrade

def test_server_without_starttls_gets_no_mail_and_no_password(db, password_env, ca_file):
    # a plain server that would even take AUTH in clear text: the client must stop first
    catcher, auth, port = TlsCatcher(), Authenticator(), free_port()
    ctl = start(Controller(catcher, hostname="127.0.0.1", port=port, server_hostname="localhost",
                           authenticator=auth, auth_require_tls=False))
    try:
        oid = queue_one(db)
        summary = deliver_due(db, settings(port, "starttls", password_env=password_env, ca_file=ca_file),
                              clock=at(T0))
    finally:
        ctl.stop()
    assert summary.sent == [] and catcher.messages == [] and auth.seen == []
    row = outbox_row(db, oid)
    assert row["status"] == "pending" and "STARTTLS" in row["last_error"]
