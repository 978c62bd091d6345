"""The rule engine (alerts/engine.py): state in the store, idempotence, restarts,
configuration reloads, QC flags, and end-to-end delivery to a loopback SMTP server."""
from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest
import sqlite_utils
from hypothesis import given, settings
from hypothesis import strategies as st

import alerts.engine as engine_mod
from alerts.engine import AlertContext, NextHighWater, evaluate, list_episodes
from alerts.mail.outbox import deliver_due, list_outbox, mail_settings_from
from alerts.rules import StationView, rules_from_config
from units import minute

T0 = pd.Timestamp("2025-10-23 00:00", tz="UTC")

STATION = StationView(id="dunmerrow", name="Port Dunmerrow", tz="Europe/Dublin",
                      datums={"chart_datum": 1.0}, display_datum="chart_datum")
SURGE = {"id": "surge", "when": "residual_above", "hold": "10min", "band": 0.05,
         "notify": ["duty@port.example"],
         "steps": [{"name": "raised", "at": 0.30},
                   {"name": "high", "at": 0.60, "notify": ["master@port.example"]}]}


def rules(*raw):
    out, errors = rules_from_config(list(raw) or [SURGE], "stations[0].rules", STATION.datums)
    assert errors == []
    return out


def frame(residual, start=T0, flags=None, predicted=3.0):
    residual = np.asarray(residual, dtype=float)
    idx = pd.date_range(start, periods=len(residual), freq="1min")
    return pd.DataFrame({"observed": predicted + residual, "predicted": predicted, "residual": residual,
                         "smoothed": residual, "flag": flags if flags is not None else 1}, index=idx)


@pytest.fixture
def path(tmp_path):
    return tmp_path / "store.sqlite"


@pytest.fixture
def db(path):
    d = sqlite_utils.Database(path)
    d.enable_wal()
    return d


def queued(db):
    return [(r["recipient"], r["kind"], r["subject"]) for r in reversed(list_outbox(db, limit=1000))]


def storm():
    """Raised for 30 min hovering around 0.30 m, up to 0.7 m for 30 min, then calm."""
    hover = 0.30 + 0.04 * np.sin(np.arange(40))
    return np.concatenate([np.zeros(20), [0.35] * 12, hover, [0.7] * 30, np.zeros(30)])


def test_a_storm_sends_one_alert_one_escalation_one_all_clear(db):
    evaluate(db, STATION, rules(), frame(storm()), now=T0 + pd.Timedelta(hours=3))
    kinds = [(k, s.split(": ")[1].split(" -")[0]) for r, k, s in queued(db) if r == "duty@port.example"]
    assert kinds == [("alert", "raised"), ("alert", "up to high"), ("all_clear", "all clear after high")]


def test_higher_step_recipients_hear_from_the_escalation_on(db):
    evaluate(db, STATION, rules(), frame(storm()), now=T0 + pd.Timedelta(hours=3))
    assert [k for r, k, _ in queued(db) if r == "master@port.example"] == ["alert", "all_clear"]


def test_a_single_spike_flagged_fail_sends_nothing(db):
    values = np.zeros(60)
    values[30] = 1.5
    flags = np.ones(60, dtype=int)
    flags[30] = 4
    evaluate(db, STATION, rules({**SURGE, "hold": 0}), frame(values, flags=flags), now=T0 + pd.Timedelta(hours=1))
    assert queued(db) == []


def test_missing_samples_never_count(db):
    evaluate(db, STATION, rules({**SURGE, "hold": 0}), frame([0.9] * 5, flags=[9] * 5), now=T0 + pd.Timedelta(hours=1))
    assert queued(db) == []


def test_suspect_samples_count_by_default(db):
    # A surge may well be flagged suspect by the expected-range test; it must still alert.
    evaluate(db, STATION, rules({**SURGE, "hold": 0}), frame([0.4] * 3, flags=[3] * 3), now=T0 + pd.Timedelta(hours=1))
    assert len(queued(db)) == 1


def test_re_evaluating_the_same_samples_queues_nothing_new(db):
    f = frame(storm())
    evaluate(db, STATION, rules(), f, now=T0 + pd.Timedelta(hours=3))
    before = queued(db)
    assert evaluate(db, STATION, rules(), f, now=T0 + pd.Timedelta(hours=3)) == []
    assert queued(db) == before


def test_restart_mid_episode_sends_no_duplicate_and_the_all_clear_still_comes(path):
    f = frame(storm())
    first = sqlite_utils.Database(path)
    evaluate(first, STATION, rules(), f.iloc[:60], now=T0 + pd.Timedelta(hours=1))
    assert [k for _, k, _ in queued(first)] == ["alert"]
    first.close()
    again = sqlite_utils.Database(path)             # a new process on the same store
    evaluate(again, STATION, rules(), f, now=T0 + pd.Timedelta(hours=3))  # overlapping samples
    kinds = [k for r, k, _ in queued(again) if r == "duty@port.example"]
    assert kinds == ["alert", "alert", "all_clear"]
    [episode] = list_episodes(again)
    assert episode["closed_at"] is not None and episode["top_step"] == "high"


def test_reloading_the_configuration_does_not_reopen_an_episode(db):
    f = frame(storm())
    evaluate(db, STATION, rules(), f.iloc[:50], now=T0 + pd.Timedelta(hours=1))
    reloaded = {**SURGE, "steps": SURGE["steps"] + [{"name": "very high", "at": 1.2}], "note": "edited"}
    evaluate(db, STATION, rules(reloaded), f.iloc[50:60], now=T0 + pd.Timedelta(hours=1))
    assert [k for r, k, _ in queued(db) if r == "duty@port.example"] == ["alert"]
    assert len(list_episodes(db)) == 1


def test_level_rule_compares_on_the_named_datum(db):
    quay = {"id": "quay", "when": "level_above", "datum": "chart_datum", "hold": 0,
            "notify": ["duty@port.example"], "steps": [{"name": "boards out", "at": 4.0}]}
    # observed 4.95 m on the station datum is 3.95 m above chart datum (1.0 m higher): below 4.0
    evaluate(db, STATION, rules(quay), frame([1.95], predicted=3.0), now=T0)
    assert queued(db) == []
    evaluate(db, STATION, rules(quay), frame([2.05], start=T0 + pd.Timedelta(minutes=1)), now=T0)
    [(_, _, subject)] = queued(db)
    assert "4.05 m above chart datum" in subject


def test_next_high_water_forecast_rule_uses_the_context(db):
    rule = {"id": "next-hw", "when": "next_high_water_above", "datum": "chart_datum",
            "notify": ["duty@port.example"], "steps": [{"name": "quay top", "at": 4.25}]}
    ctx = AlertContext(next_high_water=NextHighWater(time=int((T0 + pd.Timedelta(hours=5)).timestamp()),
                                                     level=5.40, uncertainty=0.2))
    evaluate(db, STATION, rules(rule), frame([0.5] * 60), now=T0 + pd.Timedelta(hours=1), context=ctx)
    [(_, _, subject)] = queued(db)
    assert "4.40 m above chart datum" in subject


def test_feed_silence_alerts_and_clears(db):
    rule = {"id": "quiet", "when": "feed_silent", "notify": ["tech@port.example"]}
    evaluate(db, STATION, rules(rule), None, now=T0, context=AlertContext(feed_age=45 * minute))
    evaluate(db, STATION, rules(rule), None, now=T0 + pd.Timedelta(minutes=1), context=AlertContext(feed_age=50 * minute))
    evaluate(db, STATION, rules(rule), None, now=T0 + pd.Timedelta(minutes=2), context=AlertContext(feed_age=1 * minute))
    assert [k for _, k, _ in queued(db)] == ["alert", "all_clear"]


def test_equipment_fault_lists_the_fault(db):
    rule = {"id": "kit", "when": "equipment_fault", "notify": ["tech@port.example"]}
    # the shape monitor.quality.diagnostics.equipment_faults hands over
    fault = {"kind": "stuck_sensor", "station": "dunmerrow", "sensor": "primary", "value": 62.0,
             "limit": 30.0, "unit": "min", "since": int(T0.timestamp())}
    evaluate(db, STATION, rules(rule), None, now=T0, context=AlertContext(faults=[fault]))
    row = list(db.query("SELECT text FROM outbox"))[0]
    assert "stuck sensor on primary: 62.0 min (limit 30.0 min)" in row["text"]


def test_message_shows_change_over_the_last_hour(db):
    rising = np.linspace(0.0, 0.6, 121)
    evaluate(db, STATION, rules({**SURGE, "hold": 0, "steps": [{"name": "raised", "at": 0.55}]}),
             frame(rising), now=T0 + pd.Timedelta(hours=3))
    text = list(db.query("SELECT text FROM outbox"))[0]["text"]
    assert "Change over last 60 min" in text and "+0.30 m" in text  # 0.005 m/min for 60 min


def test_alert_reaches_a_loopback_smtp_server_with_the_caution(db, smtp):
    catcher = smtp
    settings, _ = mail_settings_from({"sender": "gauge@port.example", "host": "127.0.0.1", "port": smtp.port,
                                      "security": "none"}, "mail")
    evaluate(db, STATION, rules(), frame(storm()), now=T0 + pd.Timedelta(hours=3))
    deliver_due(db, settings)  # delivery runs on the wall clock
    first = catcher.messages[0]
    assert first["Subject"].startswith("[quaywatch] Port Dunmerrow: raised")
    assert "automated and unofficial" in first.get_body(("plain",)).get_content().lower()
    assert "official warnings" in first.get_body(("html",)).get_content().lower()
    assert len({msg["Message-ID"] for msg in catcher.messages}) == len(catcher.messages) == 5


def test_replayed_episode_years_back_is_delivered_with_its_data_time(db, smtp):
    # The rules run on the replayed clock (2001); the outbox queues and expires on the wall
    # clock (injected), so the default two-day expiry does not fire for an old record.
    replay_t0 = pd.Timestamp("2001-02-03 00:00", tz="UTC")
    wall = pd.Timestamp("2030-06-01 12:00", tz="UTC").timestamp()
    catcher = smtp
    settings, _ = mail_settings_from({"sender": "gauge@port.example", "host": "127.0.0.1", "port": smtp.port,
                                      "security": "none"}, "mail")
    evaluate(db, STATION, rules(), frame(storm()[:40], start=replay_t0),
             now=replay_t0 + pd.Timedelta(minutes=40), clock=lambda: wall)
    summary = deliver_due(db, settings, clock=lambda: wall)
    assert summary.expired == [] and len(summary.sent) == 1
    row = next(db.query("SELECT created_at, event_at, attempts FROM outbox"))
    assert row["created_at"] == int(wall) and row["attempts"] == 1
    assert pd.Timestamp(row["event_at"], unit="s", tz="UTC").year == 2001
    assert "2001" in catcher.messages[0].get_body(("plain",)).get_content()


def test_works_on_an_autocommit_connection_like_the_stores(path):
    import sqlite3
    conn = sqlite3.connect(str(path), isolation_level=None)
    db = sqlite_utils.Database(conn)
    evaluate(db, STATION, rules(), frame(storm()), now=T0 + pd.Timedelta(hours=3))
    conn.close()
    again = sqlite_utils.Database(path)
    assert [k for r, k, _ in queued(again) if r == "duty@port.example"] == ["alert", "alert", "all_clear"]


def test_a_new_kind_of_fault_during_an_episode_is_one_more_message(db):
    rule = {"id": "kit", "when": "equipment_fault", "notify": ["tech@port.example"]}
    stuck = {"kind": "stuck_sensor", "sensor": "primary", "value": 62.0, "limit": 30.0, "unit": "min"}
    drift = {"kind": "sensor_drift", "sensor": "primary-backup", "value": 3.1, "limit": 2.0, "unit": "mm/day"}
    for i, faults in enumerate([[stuck], [stuck], [stuck, drift], [stuck, drift], [drift], []]):
        evaluate(db, STATION, rules(rule), None, now=T0 + pd.Timedelta(minutes=i), context=AlertContext(faults=faults))
    subjects = [s for _, _, s in queued(db)]
    assert len(subjects) == 3
    assert "new: sensor drift on primary-backup" in subjects[1]
    assert "all clear" in subjects[2]


# --------------------------------------------------------------------------- the all-clear waits on the forecast

QUAY = {"id": "quay", "when": "level_above", "datum": "chart_datum", "hold": 0, "settle": "10min", "band": 0.10,
        "notify": ["volunteers@port.example"], "steps": [{"name": "boards out", "at": 4.0}]}


def _over_then_back(start=T0):
    """The water 0.2 m over boards out (5.0 m on the station datum) for 20 min, then 4.5 m for an hour."""
    return frame(np.concatenate([np.full(20, 2.2), np.full(60, 1.5)]), start=start)


def _hw(hours_ahead, upper, at=T0):
    t = int((at + pd.Timedelta(hours=hours_ahead)).timestamp())
    return {"hw_t": t, "made_t": int(at.timestamp()), "forecast": upper - 0.3, "lower": upper - 0.6, "upper": upper,
            "coverage": 0.9, "note": "test"}


def _kinds(db):
    return [k for _, k, _ in queued(db)]


def test_no_all_clear_while_the_next_high_waters_range_reaches_the_step(db):
    # 5.05 m on the station datum is 4.05 m above chart datum: the top of the range reaches 4.0.
    ctx = AlertContext(next_high_water=_hw(6, 5.05))
    evaluate(db, STATION, rules(QUAY), _over_then_back(), now=T0 + pd.Timedelta(minutes=80), context=ctx)
    subjects = [s for _, _, s in queued(db)]
    assert _kinds(db) == ["alert", "alert"] and "not clear yet" in subjects[1]
    assert list_episodes(db)[0]["closed_at"] is None


def test_the_all_clear_comes_once_the_range_tops_out_below_the_step_and_says_by_how_much(db):
    evaluate(db, STATION, rules(QUAY), _over_then_back(), now=T0 + pd.Timedelta(minutes=80),
             context=AlertContext(next_high_water=_hw(6, 5.05)))
    later = frame(np.full(10, 1.5), start=T0 + pd.Timedelta(minutes=80))
    evaluate(db, STATION, rules(QUAY), later, now=T0 + pd.Timedelta(minutes=90),
             context=AlertContext(next_high_water=_hw(6, 4.85, at=T0 + pd.Timedelta(minutes=80))))
    assert _kinds(db) == ["alert", "alert", "all_clear"]
    text = next(db.query("SELECT text FROM outbox WHERE kind = 'all_clear'"))["text"]
    # the range tops out at 3.85 m above chart datum, 0.15 m below boards out at 4.00 m
    assert "0.15 m below boards out (4.00 m above chart datum)" in text


def test_a_high_water_beyond_the_horizon_does_not_hold_the_all_clear(db):
    evaluate(db, STATION, rules({**QUAY, "clear_horizon": "4h"}), _over_then_back(),
             now=T0 + pd.Timedelta(minutes=80), context=AlertContext(next_high_water=_hw(6, 5.05)))
    assert _kinds(db) == ["alert", "all_clear"]


def test_any_high_water_within_the_horizon_holds_it_not_only_the_next(db):
    ctx = AlertContext(high_waters=[_hw(3, 4.6), _hw(10, 5.2)])
    evaluate(db, STATION, rules(QUAY), _over_then_back(), now=T0 + pd.Timedelta(minutes=80), context=ctx)
    assert _kinds(db) == ["alert", "alert"]


def test_not_clear_yet_is_said_once_per_episode(db):
    ctx = AlertContext(next_high_water=_hw(6, 5.05))
    evaluate(db, STATION, rules(QUAY), _over_then_back(), now=T0 + pd.Timedelta(minutes=80), context=ctx)
    more = frame(np.full(30, 1.5), start=T0 + pd.Timedelta(minutes=80))
    evaluate(db, STATION, rules(QUAY), more, now=T0 + pd.Timedelta(minutes=110), context=ctx)
    assert _kinds(db) == ["alert", "alert"]


def test_without_a_forecast_the_all_clear_goes_as_before(db):
    evaluate(db, STATION, rules(QUAY), _over_then_back(), now=T0 + pd.Timedelta(minutes=80))
    assert _kinds(db) == ["alert", "all_clear"]


def test_each_recipient_gets_the_form_set_for_them(db):
    # [mail.forms]: duty gets the brief form, master the full form (the default)
    from dataclasses import replace

    station = replace(STATION, forms=(("duty@port.example", "brief"),))
    evaluate(db, station, rules(), frame(storm()), now=T0 + pd.Timedelta(hours=3))
    rows = {(r["recipient"], r["key"]): r for r in db.query("SELECT recipient, key, text FROM outbox")}
    esc = [k for (rc, k) in rows if "/escalated/" in k]
    assert esc
    brief = rows[("duty@port.example", esc[0])]["text"]
    full = rows[("master@port.example", esc[0])]["text"]
    assert "Rule:" not in brief and "the sea stands" in brief
    assert "Rule:" in full and "the sea stands" not in full


def test_one_episode_keeps_one_message_per_recipient_across_forms(db):
    from dataclasses import replace

    station = replace(STATION, forms=(("duty@port.example", "brief"),))
    evaluate(db, station, rules(), frame(storm()), now=T0 + pd.Timedelta(hours=3))
    evaluate(db, station, rules(), frame(storm()), now=T0 + pd.Timedelta(hours=3))
    keys = [(r["recipient"], r["key"]) for r in db.query("SELECT recipient, key FROM outbox")]
    assert len(keys) == len(set(keys))


QUAY_EDGE = {"id": "quay", "when": "level_above", "datum": "chart_datum", "hold": 0,
             "notify": ["duty@port.example"], "steps": [{"name": "quay edge", "at": 9.0}]}


@pytest.mark.parametrize("order", [("surge", "quay"), ("quay", "surge")])
def test_a_rule_that_fails_midway_leaves_nothing_and_the_other_rule_is_stored(db, monkeypatch, caplog, order):
    # the surge rule opens an episode and queues its messages, then fails (at its peak's
    # update): none of that may stay, and the level rule, before or after it, is stored
    track = engine_mod._track_peak

    def failing(db_, rule, *a, **k):
        if rule.id == "surge":
            raise RuntimeError("invented failure inside the surge rule")
        return track(db_, rule, *a, **k)
    monkeypatch.setattr(engine_mod, "_track_peak", failing)
    raw = {"surge": {**SURGE, "hold": 0}, "quay": QUAY_EDGE}
    both = rules(*[raw[k] for k in order])
    samples = frame(np.r_[np.zeros(10), [0.5] * 10])
    now = T0 + pd.Timedelta(minutes=30)
    events = evaluate(db, STATION, both, samples, now=now)
    assert events == []
    assert "rule surge: evaluation failed" in caplog.text
    state = {r["rule"]: r for r in db.query("SELECT * FROM alert_state")}
    assert set(state) == {"quay"} and state["quay"]["watermark"] == int((T0 + pd.Timedelta(minutes=19)).timestamp())
    assert list(db.query("SELECT * FROM alert_episodes")) == [] and queued(db) == []
    # nothing of it was kept, so the surge rule opens its episode once when it works again
    monkeypatch.setattr(engine_mod, "_track_peak", track)
    events = evaluate(db, STATION, both, samples, now=now)
    assert [(e["rule"], e["event"]) for e in events] == [("surge", "opened")]
    assert len(list(db.query("SELECT * FROM alert_episodes"))) == 1


@settings(max_examples=300, deadline=None)
@given(values=st.lists(st.one_of(st.none(), st.integers(), st.floats(allow_nan=False), st.booleans(), st.text()),
                       max_size=4))
def test_the_state_columns_text_is_json_dumps(values):
    # Reference: json.dumps of the list, as the state was saved before its texts were kept;
    # equal keys of other types (1, 1.0, True) each keep their own text
    for v in (values, [1], [1.0], [True], [None, 1], [None, 1.0]):
        assert engine_mod._json_list(tuple(v)) == json.dumps(list(v))
        assert engine_mod._json_tuple(json.dumps(list(v))) == tuple(v)


def test_quiet_rules_write_their_state_rows_without_savepoints(db):
    # below every step, a rule writes its state row alone (one statement): no savepoint is
    # set for it; a rule that opens an episode writes in one
    raw = [{**SURGE, "hold": 0}, QUAY_EDGE]
    said = []
    db.conn.set_trace_callback(said.append)
    evaluate(db, STATION, rules(*raw), frame(np.zeros(10)), now=T0 + pd.Timedelta(minutes=30))
    assert [s.split()[0] for s in said if s.split()[0] in ("SAVEPOINT", "INSERT", "UPDATE")] == ["INSERT", "INSERT"]
    said.clear()
    events = evaluate(db, STATION, rules(*raw), frame(np.r_[np.zeros(10), [0.5] * 10]),
                      now=T0 + pd.Timedelta(minutes=30))
    assert [(e["rule"], e["event"]) for e in events] == [("surge", "opened")]
    assert sum(s.startswith("SAVEPOINT") for s in said) == 1


def _state_table(db) -> dict:
    return {r["rule"]: r for r in db.query("SELECT * FROM alert_state WHERE station = ?", [STATION.id])}


_RAW = [SURGE, {"id": "kit", "when": "equipment_fault", "notify": ["tech@port.example"]},
        {"id": "quiet", "when": "feed_silent", "notify": ["tech@port.example"]}]
_STUCK = {"kind": "stuck_sensor", "sensor": "primary", "value": 62.0, "limit": 30.0, "unit": "min"}
_DRIFT = {"kind": "sensor_drift", "sensor": "primary-backup", "value": 3.1, "limit": 2.0, "unit": "mm/day"}


def _passes(db, memo, monkeypatch, fail_at=60) -> list:
    """Evaluations ten minutes apart over a storm (alert, escalation, all-clear), with an
    equipment fault whose kinds change (the ``announced`` column) and a silent feed; at
    ``fail_at`` the surge rule fails midway. With a memo, checks after each evaluation that
    it holds the rows the store holds (read here with a query of its own), or nothing after
    the failure; returns the ``announced`` of the fault rule as kept each time."""
    values = storm()
    track = engine_mod._track_peak
    seen = []
    for k in range(0, len(values), 10):
        faults = [[], [_STUCK], [_STUCK], [_STUCK, _DRIFT], [_DRIFT], []][min(k // 25, 5)]
        ctx = AlertContext(feed_age=(50 if 40 <= k < 80 else 1) * minute, faults=faults)
        fail = k == fail_at

        def failing(db_, rule, *a, **kw):
            if fail and rule.id == "surge":
                raise RuntimeError("invented failure inside the surge rule")
            return track(db_, rule, *a, **kw)
        monkeypatch.setattr(engine_mod, "_track_peak", failing)
        evaluate(db, STATION, rules(*_RAW), frame(values[:k + 10]), now=T0 + pd.Timedelta(minutes=k + 10),
                 context=ctx, memo=memo)
        if memo is not None:
            if fail:
                assert memo.rows is None  # read again from the store next time
            else:
                assert memo.rows == _state_table(db)
                seen.append(memo.rows["kit"]["announced"])
    monkeypatch.setattr(engine_mod, "_track_peak", track)
    return seen


_TABLES = ("SELECT * FROM alert_state ORDER BY rule", "SELECT * FROM alert_episodes ORDER BY id",
           "SELECT kind, key, recipient, subject, text, event_at FROM outbox ORDER BY id")


def test_a_memo_of_the_state_rows_always_equals_the_store_and_changes_nothing_stored(tmp_path, monkeypatch):
    with_memo = sqlite_utils.Database(tmp_path / "memo.sqlite")
    seen = _passes(with_memo, engine_mod.StateMemo(), monkeypatch)
    without = sqlite_utils.Database(tmp_path / "plain.sqlite")
    _passes(without, None, monkeypatch)
    # the scenario reaches what it is meant to: every evaluation but the failed one kept its
    # rows, the fault's kinds were told of one by one, alerts opened and cleared
    assert len(seen) == len(range(0, len(storm()), 10)) - 1
    assert json.dumps(sorted(["stuck_sensor/primary", "sensor_drift/primary-backup"])) in seen
    kinds = [k for _, k, _ in queued(with_memo)]
    assert kinds.count("all_clear") >= 2 and len(kinds) >= 6
    for sql in _TABLES:
        assert list(with_memo.query(sql)) == list(without.query(sql)), sql


def test_a_state_row_whose_watermark_alone_moves_is_stored_as_the_whole_rows_upsert_stores_it(tmp_path,
                                                                                              monkeypatch):
    # Reference: every state row written by the upsert of all its columns (the statement
    # used before the watermark's own UPDATE); the same passes, with and without a memo
    real = engine_mod._save_state
    said, said_whole = [], []

    def upsert_only(db, station, rule, state, episode_id, now, stored=None):
        return real(db, station, rule, state, episode_id, now)  # never told the stored row

    for memo in (None, engine_mod.StateMemo()):
        quick = sqlite_utils.Database(tmp_path / f"quick{memo is None}.sqlite")
        quick.conn.set_trace_callback(said.append)
        _passes(quick, memo, monkeypatch)
        with monkeypatch.context() as mp:
            mp.setattr(engine_mod, "_save_state", upsert_only)
            whole = sqlite_utils.Database(tmp_path / f"whole{memo is None}.sqlite")
            whole.conn.set_trace_callback(said_whole.append)
            _passes(whole, None, monkeypatch)
        for sql in _TABLES:
            assert list(quick.query(sql)) == list(whole.query(sql)), sql
    assert sum(x.startswith("UPDATE alert_state SET watermark") for x in said) >= 20  # the UPDATE was used
    assert not any(x.startswith("UPDATE alert_state SET watermark") for x in said_whole)  # and not here


def test_a_watermark_update_that_finds_no_row_falls_back_to_the_whole_upsert(tmp_path):
    """Told of a stored row the store no longer has, the state is still stored whole."""
    db = sqlite_utils.Database(tmp_path / "gone.sqlite")
    engine_mod.ensure_alert_schema(db)
    (rule,) = rules()
    state = engine_mod.RuleState()
    values = engine_mod._save_state(db, STATION.id, rule, state, None, 100)
    db.conn.execute("DELETE FROM alert_state")
    moved = engine_mod.with_watermark(state, 160)
    engine_mod._save_state(db, STATION.id, rule, moved, None, 200, stored=dict(zip(engine_mod._SAVED, values)))
    (row,) = db.query("SELECT * FROM alert_state")
    assert row["watermark"] == 160 and row["updated_at"] == 200 and row["steps"] == '["raised", "high"]'


