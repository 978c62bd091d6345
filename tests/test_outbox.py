"""Store-and-forward outbox and SMTP delivery (alerts/mail/outbox.py), against a real SMTP
server on loopback (aiosmtpd)."""
from __future__ import annotations


import pytest
import sqlite_utils

import alerts.mail.outbox as outbox_mod
from alerts.mail.outbox import deliver_due, enqueue, list_outbox, mail_settings_from
from units import minute, hour

T0 = 1_761_220_800  # 2025-10-23 12:00 UTC


def at(t):
    """An injected wall clock standing at ``t`` [Unix s] (no sleeping in tests)."""
    return lambda: t


def settings_for(port, **extra):
    raw = {"sender": "Quay monitor <gauge@port.example>", "host": "127.0.0.1", "port": port,
           "security": "none", "timeout": "5s", "retry_first": "1min", "retry_max": "10min",
           "give_up_after": "6h"}
    raw.update(extra)
    s, errors = mail_settings_from(raw, "mail")
    assert errors == []
    return s


def test_message_arrives_with_subject_message_id_and_both_parts(db, smtp, port):
    [oid] = enqueue(db, ["duty@port.example"], "[quaywatch] test subject", "plain body", "<p>html body</p>",
                    "alert", "k1", clock=at(T0))
    summary = deliver_due(db, settings_for(port), clock=at(T0))
    assert summary.sent == [oid]
    [(rcpt, msg)] = smtp.envelopes
    assert rcpt == ("duty@port.example",)
    assert msg["Subject"] == "[quaywatch] test subject"
    assert msg["Message-ID"] == list_outbox(db)[0]["message_id"]
    assert msg.get_content_type() == "multipart/alternative"


def test_same_key_queued_twice_is_one_message(db):
    enqueue(db, ["a@port.example"], "s", "t", None, "alert", "same", clock=at(T0))
    assert enqueue(db, ["a@port.example"], "s", "t", None, "alert", "same", clock=at(T0)) == []


def test_one_row_per_recipient(db):
    ids = enqueue(db, ["a@port.example", "b@port.example", "a@port.example"], "s", "t", None, "alert", "k", clock=at(T0))
    assert len(ids) == 2


def test_server_down_then_up_every_message_arrives_in_order_once(db, port, smtp_server):
    s = settings_for(port)
    for i in range(3):
        enqueue(db, ["a@port.example", "b@port.example"], f"msg {i}", f"body {i}", None, "alert", f"k{i}",
                clock=at(T0 + i))
    down = deliver_due(db, s, clock=at(T0 + 10))       # nothing listens on the port
    assert down.sent == [] and down.retrying
    assert all(r["status"] == "pending" for r in list_outbox(db))
    catcher = smtp_server(port)
    t = T0 + 10
    for _ in range(10):                       # delivery rounds, a minute apart
        t += minute
        deliver_due(db, s, clock=at(t))
    got = [(r[0], m["Subject"]) for r, m in catcher.envelopes]
    for addr in ("a@port.example", "b@port.example"):
        assert [subj for a, subj in got if a == addr] == ["msg 0", "msg 1", "msg 2"]
    assert len(got) == 6


def test_a_failed_earlier_message_blocks_later_ones_to_that_recipient(db, smtp, port):
    s = settings_for(port)
    enqueue(db, ["a@port.example"], "first", "t", None, "alert", "k1", clock=at(T0))
    enqueue(db, ["a@port.example"], "second", "t", None, "alert", "k2", clock=at(T0))
    enqueue(db, ["b@port.example"], "other", "t", None, "alert", "k3", clock=at(T0))
    db.conn.execute("UPDATE outbox SET next_try = ? WHERE subject = 'first'", (T0 + hour,))
    db.conn.commit()
    summary = deliver_due(db, s, clock=at(T0))
    assert [m["Subject"] for _, m in smtp.envelopes] == ["other"]
    assert summary.waiting == 2


def test_back_off_doubles_up_to_the_limit():
    s, _ = mail_settings_from({"sender": "g@port.example", "host": "localhost", "security": "none",
                               "retry_first": "1min", "retry_max": "10min"}, "mail")
    assert [s.backoff(n) for n in (1, 2, 3, 4, 5)] == [60, 120, 240, 480, 600]


def test_undeliverable_message_expires_and_is_reported(db, port, caplog):
    s = settings_for(port, give_up_after="1h")
    [oid] = enqueue(db, ["a@port.example"], "lost cause", "t", None, "alert", "k", clock=at(T0))
    deliver_due(db, s, clock=at(T0))
    summary = deliver_due(db, s, clock=at(T0 + hour))
    assert summary.expired == [oid]
    assert list_outbox(db, status="expired")[0]["id"] == oid
    assert "expired undelivered" in caplog.text


def test_crash_between_acceptance_and_mark_resends_with_the_same_message_id(db, smtp, port, tmp_path, monkeypatch):
    s = settings_for(port, save_dir=str(tmp_path / "copies"))
    enqueue(db, ["a@port.example"], "once", "t", None, "alert", "k", clock=at(T0))

    def crash(*args):
        raise SystemExit("killed after the server accepted")

    monkeypatch.setattr(outbox_mod, "_save_copy", crash)
    with pytest.raises(SystemExit):
        deliver_due(db, s, clock=at(T0))
    assert list_outbox(db)[0]["status"] == "sending"
    monkeypatch.undo()
    deliver_due(db, s, clock=at(T0 + hour))             # after the lease has run out
    ids = [m["Message-ID"] for _, m in smtp.envelopes]
    assert len(ids) == 2 and ids[0] == ids[1]
    assert list_outbox(db)[0]["status"] == "sent"


def test_a_live_lease_keeps_another_round_off_the_row(db, smtp, port):
    s = settings_for(port)
    enqueue(db, ["a@port.example"], "once", "t", None, "alert", "k", clock=at(T0))
    db.conn.execute("UPDATE outbox SET status = 'sending', claimed_until = ?", (T0 + 300,))
    db.conn.commit()
    deliver_due(db, s, clock=at(T0))
    assert smtp.envelopes == []


def test_password_is_read_from_the_environment_and_never_stored(db, monkeypatch):
    monkeypatch.setenv("QW_TEST_PW", "s3cret-value")
    s, errors = mail_settings_from({"sender": "g@port.example", "host": "smtp.port.example", "user": "g",
                                    "password_env": "QW_TEST_PW"}, "mail")
    assert errors == [] and s.password() == "s3cret-value"
    assert "s3cret" not in repr(s)


def test_password_file_is_read_without_its_newline(tmp_path):
    (tmp_path / "pw").write_text("hunter2\n")
    (tmp_path / "pw").chmod(0o600)
    s, _ = mail_settings_from({"sender": "g@port.example", "host": "smtp.port.example", "user": "g",
                               "password_file": str(tmp_path / "pw")}, "mail")
    assert s.password() == "hunter2"


def test_plain_text_smtp_to_a_remote_host_is_refused():
    _, errors = mail_settings_from({"sender": "g@port.example", "host": "smtp.port.example",
                                    "security": "none"}, "mail")
    assert any(e.startswith("mail.security:") for e in errors)


def test_settings_errors_start_with_the_key_path():
    _, errors = mail_settings_from({"host": "x", "port": "twenty-five", "retry_first": "soon", "colour": 1}, "mail")
    assert errors and all(e.startswith("mail.") for e in errors)
    assert {e.split(":")[0] for e in errors} >= {"mail.sender", "mail.port", "mail.retry_first", "mail.colour"}


def test_sent_messages_are_also_saved_as_eml(db, smtp, port, tmp_path):
    s = settings_for(port, save_dir=str(tmp_path / "mail"))
    enqueue(db, ["a@port.example"], "kept", "t", "<p>h</p>", "alert", "k", clock=at(T0))
    deliver_due(db, s, clock=at(T0))
    [path] = (tmp_path / "mail").glob("*.eml")
    assert "Subject: kept" in path.read_text()


def test_save_only_transport_needs_no_server(db, tmp_path):
    s, errors = mail_settings_from({"sender": "g@port.example", "save_dir": str(tmp_path / "mail")}, "mail")
    assert errors == []
    [oid] = enqueue(db, ["a@port.example"], "kept", "t", None, "alert", "k", clock=at(T0))
    assert deliver_due(db, s, clock=at(T0)).sent == [oid]
    assert len(list((tmp_path / "mail").glob("*.eml"))) == 1


from hypothesis import given, settings as hsettings, strategies as st  # noqa: E402


@hsettings(max_examples=150, deadline=None)
@given(st.dictionaries(
    st.sampled_from(["sender", "host", "port", "security", "user", "password_env", "password_file",
                     "timeout", "retry_first", "retry_max", "give_up_after", "save_dir", "other"]),
    st.one_of(st.none(), st.booleans(), st.integers(-10, 70000), st.floats(allow_nan=True), st.text(max_size=12),
              st.sampled_from(["starttls", "tls", "none", "127.0.0.1", "g@port.example", "10min", "X_PW"]),
              st.lists(st.integers(), max_size=2)),
    max_size=8))
def test_any_mail_table_gives_settings_or_keyed_errors(raw):
    s, errors = mail_settings_from(raw, "mail")
    assert (s is None) == bool(errors)
    assert all(e.startswith("mail.") for e in errors)


# --------------------------------------------------------------------------- the wall clock

REPLAYED = 1_000_000_000  # 2001-09-09 01:46:40 UTC: an event time from a replayed record


def test_message_about_a_replayed_event_years_back_is_delivered_not_expired(db, smtp, port):
    # give_up_after is 6 h: counted from the event's data time the row would expire at once
    s = settings_for(port)
    [oid] = enqueue(db, ["a@port.example"], "replayed storm", "t", None, "alert", "k",
                    event_time=REPLAYED, clock=at(T0))
    summary = deliver_due(db, s, clock=at(T0))
    assert summary.sent == [oid] and summary.expired == []
    row = outbox_mod.outbox_row(db, oid)
    assert (row["status"], row["attempts"], row["created_at"], row["event_at"]) == ("sent", 1, T0, REPLAYED)


def test_expiry_counts_wall_clock_time_from_queueing(db, port):
    s = settings_for(port, give_up_after="1h")   # nothing listens on the port
    [oid] = enqueue(db, ["a@port.example"], "lost cause", "t", None, "alert", "k",
                    event_time=REPLAYED, clock=at(T0))
    assert deliver_due(db, s, clock=at(T0 + 59 * minute)).expired == []
    assert deliver_due(db, s, clock=at(T0 + hour)).expired == [oid]


def test_queue_time_defaults_to_the_system_clock_not_the_event_time(db, monkeypatch):
    monkeypatch.setattr(outbox_mod.time, "time", lambda: float(T0))
    [oid] = enqueue(db, ["a@port.example"], "s", "t", None, "alert", "k", now=REPLAYED)
    row = outbox_mod.outbox_row(db, oid)
    assert (row["created_at"], row["next_try"], row["event_at"]) == (T0, T0, REPLAYED)


def test_older_outbox_table_gains_the_event_time_column(tmp_path):
    old = sqlite_utils.Database(tmp_path / "old.sqlite")
    old["outbox"].create({"id": int, "created_at": int, "kind": str, "key": str, "recipient": str,
                          "subject": str, "text": str, "html": str, "attachments": str, "message_id": str,
                          "status": str, "attempts": int, "next_try": int, "claimed_until": int,
                          "last_try": int, "last_error": str, "sent_at": int, "expired_at": int}, pk="id")
    outbox_mod.ensure_outbox_schema(old)
    assert "event_at" in old["outbox"].columns_dict


# --------------------------------------------------------------------------- attachments

def test_attachment_content_id_survives_the_queue(db):
    png = b"\x89PNG\r\n\x1a\n" + b"\0" * 16
    [oid] = enqueue(db, ["a@port.example"], "report", "t", '<img src="cid:chart-1@quaywatch">', "report", "k",
                    attachments=[{"filename": "chart.png", "content_type": "image/png", "data": png,
                                  "content_id": "chart-1@quaywatch"},
                                 ("plain.csv", b"t,level\n", "text/csv")], clock=at(T0))
    got = outbox_mod._decode_attachments(outbox_mod.outbox_row(db, oid)["attachments"])
    assert [a.get("content_id") for a in got] == ["chart-1@quaywatch", None]
    assert got[0]["data"] == png


# --------------------------------------------------------------------------- password file permissions

@pytest.mark.parametrize("mode", [0o644, 0o604, 0o666, 0o602])
def test_a_password_file_other_users_may_read_or_write_is_refused_with_the_fix(tmp_path, mode):
    from alerts.mail.outbox import password_file_problem

    pw = tmp_path / "smtp password"
    pw.write_text("hunter2\n")
    pw.chmod(mode)
    problem = password_file_problem(pw)
    assert problem is not None and f"{mode:04o}" in problem and f"chmod o-rwx '{pw}'" in problem


@pytest.mark.parametrize("mode", [0o600, 0o400, 0o640])
def test_a_password_file_for_its_owner_and_group_is_accepted(tmp_path, mode):
    from alerts.mail.outbox import password_file_problem

    (tmp_path / "pw").write_text("hunter2\n")
    (tmp_path / "pw").chmod(mode)
    assert password_file_problem(tmp_path / "pw") is None


def test_a_password_file_opened_up_later_is_refused_when_read(tmp_path):
    (tmp_path / "pw").write_text("hunter2\n")
    (tmp_path / "pw").chmod(0o600)
    s, errors = mail_settings_from({"sender": "g@port.example", "host": "smtp.port.example", "user": "g",
                                    "password_file": str(tmp_path / "pw")}, "mail")
    assert errors == []
    (tmp_path / "pw").chmod(0o644)
    with pytest.raises(RuntimeError, match="chmod o-rwx"):
        s.password()
