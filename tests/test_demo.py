"""The demo scenario (sample_feeds/generate.py, demo/port.toml) and the demo run (monitor.demo).

The scenario is invented; the checks of its science name their outside sources.
"""
from __future__ import annotations

import importlib.util
import sys
import tomllib
from pathlib import Path

import erfa
import numpy as np
import pytest
from units import cm, minute, hour, degree

ROOT = Path(__file__).resolve().parent.parent


def _load_generator():
    spec = importlib.util.spec_from_file_location("sample_feeds_generate", ROOT / "sample_feeds" / "generate.py")
    mod = importlib.util.module_from_spec(spec)
    sys.modules[spec.name] = mod
    spec.loader.exec_module(mod)
    return mod


gen = _load_generator()


@pytest.fixture(scope="module")
def port():
    with open(ROOT / "demo" / "port.toml", "rb") as fh:
        return tomllib.load(fh)


@pytest.fixture(scope="module")
def scenario(port):
    return gen.build(port)


def _wrap(deg):
    return (np.asarray(deg) + 180.0) % 360.0 - 180.0


# --------------------------------------------------------------------------- the scenario's science


def test_astronomical_arguments_match_erfa():
    # Reference: IERS Conventions 2003 fundamental arguments as implemented by ERFA (pyerfa):
    # s = F + Omega, h = s - D, p = s - l, N = Omega.
    t = np.arange(np.datetime64("2025-08-25T00:00"), np.datetime64("2025-10-27T00:00"), np.timedelta64(7, "h"))
    a = gen.astro_arguments(t)
    T = (gen.unix_seconds(t) / 86400.0 + 2440587.5 - 2451545.0) / 36525.0
    F, Om = np.degrees(erfa.faf03(T)), np.degrees(erfa.faom03(T))
    l, D = np.degrees(erfa.fal03(T)), np.degrees(erfa.fad03(T))
    s = F + Om
    np.testing.assert_allclose(_wrap(a["s"] - s), 0, atol=0.01 * degree)
    np.testing.assert_allclose(_wrap(a["h"] - (s - D)), 0, atol=0.01 * degree)
    np.testing.assert_allclose(_wrap(a["p"] - (s - l)), 0, atol=0.01 * degree)
    np.testing.assert_allclose(_wrap(a["N"] - Om), 0, atol=0.01 * degree)


def test_k1_argument_is_the_sidereal_angle_less_90_degrees():
    # K1's equilibrium argument is the Greenwich sidereal angle - 90 deg (Schureman 1958,
    # Table 2: T + h - 90 with T = 180 + 15 UT); sidereal angle from ERFA's gmst06 (UT1 and
    # TT taken as UTC, which moves it by far less than the tolerance).
    t = np.arange(np.datetime64("2025-08-25T00:00"), np.datetime64("2025-10-27T00:00"), np.timedelta64(5, "h"))
    a = gen.astro_arguments(t)
    jd = gen.unix_seconds(t) / 86400.0 + 2440587.5
    gmst = np.degrees(erfa.gmst06(jd, 0.0, jd, 0.0))
    v_k1 = a["tau"] + a["s"] + 90.0
    np.testing.assert_allclose(_wrap(v_k1 - (gmst - 90.0)), 0, atol=0.01 * degree)


def test_m2_speed_is_the_published_value():
    # M2 speed 28.9841042 deg/h (Schureman 1958, Table 2; Foreman 1977, Table 1).
    t = np.array(["2025-10-01T00:00", "2025-10-01T01:00"], dtype="datetime64[s]")
    a = gen.astro_arguments(t)
    speed = 2 * (a["tau"][1] - a["tau"][0])
    assert speed == pytest.approx(28.9841042, abs=1e-6)


def test_port_is_mixed_mainly_semidiurnal(port):
    # Form factor F = (K1 + O1) / (M2 + S2); 0.25 < F <= 1.5 is "mixed, mainly semidiurnal"
    # (Courtier 1938 classification as given by Pugh and Woodworth 2014, sec. 4.2; from memory).
    amp = {c["name"]: c["amplitude"] for c in port["tide"]["constituents"]}
    F = (amp["K1"] + amp["O1"]) / (amp["M2"] + amp["S2"])
    assert 0.25 < F <= 1.5


def test_inverse_barometer_explains_the_pressure_part_of_the_surge(scenario):
    # Inverse barometer: about 1 cm of sea level per hPa (Pugh and Woodworth 2014, sec. 7.2).
    truth = scenario["truth"]
    assert truth["storm"]["inverse_barometer_m_per_hpa"] == pytest.approx(1 * cm)
    drop = 1013.0 - truth["storm"]["min_pressure_hpa"]
    assert 0.3 < drop * 1 * cm < truth["storm"]["main_peak"]["surge"]


# --------------------------------------------------------------------------- the scenario's story


def test_first_surge_peak_meets_low_water_and_the_second_high_water(scenario):
    s = scenario["truth"]["storm"]
    assert s["first_peak"]["near"] == "low water" and s["main_peak"]["near"] == "high water"
    assert 0.8 <= s["first_peak"]["surge"] <= 1.2
    assert 0.8 <= s["main_peak"]["surge"] <= 1.2


def test_only_the_storm_high_water_crosses_the_quay_levels(scenario):
    s = scenario["truth"]["storm"]
    first = np.datetime64(s["boards_out_crossed"]["first"].rstrip("Z"))
    last = np.datetime64(s["boards_out_crossed"]["last"].rstrip("Z"))
    peak = np.datetime64(s["main_peak"]["time"].rstrip("Z"))
    assert first < peak < last
    assert (last - first) < np.timedelta64(6, "h")  # one high water, not two
    assert s["quay_top_crossed"] is not None


def test_first_spike_alone_would_cross_the_boards_out_level(scenario):
    t = scenario["truth"]
    spike = t["faults"]["spikes"][0]
    assert spike["level_with_spike"] > t["datums"]["boards_out_sd"]
    assert spike["level_with_spike"] - spike["size"] < t["datums"]["boards_out_sd"] - 10 * cm


def test_faults_lie_inside_the_short_window(scenario):
    t = scenario["truth"]
    lo, hi = t["short_window"]["start"], t["short_window"]["end"]
    f = t["faults"]
    times = [s["time"] for s in f["spikes"]] + [f["flat_line"]["start"], f["flat_line"]["end"],
                                                 f["gap"]["start"], f["gap"]["end"],
                                                 f["clock_offset"]["start"], f["clock_offset"]["end"]]
    assert all(lo <= x <= hi for x in times)  # ISO 8601 UTC strings sort as times


def test_fit_to_the_history_recovers_the_invented_constants(port):
    # The history is synthesised here from the invented constants with Schureman's and
    # Foreman's arguments; predictor.harmonic_fit must find them again. 190 days resolve
    # K1 from P1 and S2 from K2 (Rayleigh criterion, 182.6 days); Sa needs a year and is
    # left out. Tolerances (our choice): 1 cm and 3 deg against 4.5 cm of red weather noise.
    import pandas as pd

    from predictor import harmonic_fit

    df = pd.read_csv(ROOT / "sample_feeds" / "history.csv")
    model = harmonic_fit(pd.DatetimeIndex(pd.to_datetime(df["time"], utc=True)), df["level"].to_numpy())
    got = {c["name"]: c for c in model.constituents}
    for want in port["tide"]["constituents"]:
        if want["amplitude"] < 0.1:
            continue
        c = got[want["name"]]
        assert c["amplitude"] == pytest.approx(want["amplitude"], abs=1 * cm), want["name"]
        assert abs(_wrap(c["phase"] - want["phase"])) < 3 * degree, want["name"]


def test_committed_feeds_are_what_the_generator_writes(tmp_path):
    gen.write_all(tmp_path)
    for name in ("history.csv", "storm/primary.csv", "storm/backup.txt", "storm/barometer.csv", "truth.json"):
        assert (tmp_path / name).read_bytes() == (ROOT / "sample_feeds" / name).read_bytes(), name


def test_sample_feeds_stay_small():
    total = sum(p.stat().st_size for p in (ROOT / "sample_feeds").rglob("*") if p.is_file())
    assert total < 15e6


# --------------------------------------------------------------------------- the demo's own run
# One quick run (the days around the storm, replayed as fast as the daemon takes them), shared
# by the tests below. Each test compares what the monitor found with what the generator
# injected (sample_feeds/truth.json), within the tolerances stated beside it.


def _utc(text):
    import pandas as pd

    return pd.Timestamp(text)


@pytest.fixture(scope="module")
def demo(tmp_path_factory):
    from monitor.demo import load_truth, run_demo

    out = tmp_path_factory.mktemp("demo-output")
    summary = run_demo(out, short=True, speedup=0, timeout=240, quiet=True)
    return {"summary": summary, "truth": load_truth(), "out": out}


def _episodes(demo, rule):
    return [e for e in demo["summary"].episodes if e["rule"] == rule]


@pytest.mark.slow
def test_demo_opens_one_quay_episode_at_the_storm_high_water(demo):
    import pandas as pd

    crossed = demo["truth"]["storm"]["boards_out_crossed"]
    (ep,) = _episodes(demo, "quay")  # one episode: the near-miss spike opened none
    opened = pd.Timestamp(ep["opened_at"], unit="s", tz="UTC")
    # Opens after the rule's 10-minute hold (demo/config.toml); 10 minutes more for smoothing.
    assert _utc(crossed["first"]) <= opened <= _utc(crossed["first"]) + pd.Timedelta(20 * minute, "s")
    assert ep["top_step"] == "over the quay"


def _forecast_log(demo):
    import sqlite3

    import pandas as pd

    con = sqlite3.connect(demo["out"] / "quaywatch.db")
    try:
        return pd.read_sql_query("SELECT made_t, hw_t, forecast, lower, upper, method FROM hw_forecast_log",
                                 con)
    finally:
        con.close()


def _standing(log, t):
    """The forecasts standing at ``t`` [Unix s]: the set issued last at or before it."""
    made = log["made_t"][log["made_t"] <= t].max()
    return log[log["made_t"] == made]


@pytest.mark.slow
def test_demo_says_not_clear_yet_while_the_next_high_water_may_reach_boards_out(demo):
    # The water falls back below boards out an hour or so after the storm's high water, with the
    # surge still near +1 m: the forecast range of the next high water reaches boards out again.
    mail = demo["summary"].mail
    held = [i for i, m in enumerate(mail) if "not clear yet" in m.subject.lower()]
    assert held and any("volunteers@dunmerrow.example" in mail[i].recipients for i in held)
    cleared = [i for i, m in enumerate(mail) if "all clear" in m.subject.lower() and "over the quay" in m.subject.lower()]
    assert all(min(held) < i for i in cleared)


@pytest.mark.slow
def test_demo_sends_no_quay_all_clear_while_a_forecast_reaches_boards_out(demo):
    import pandas as pd

    truth = demo["truth"]
    crossed = truth["storm"]["boards_out_crossed"]
    boards = truth["datums"]["boards_out_sd"]        # the forecast log keeps the station datum
    (ep,) = _episodes(demo, "quay")
    log = _forecast_log(demo)
    if ep["closed_at"] is None:
        # the replay ended first: then a high water within 12 h still reaches boards out
        end = int(_utc(truth["short_window"]["end"]).timestamp())
        now = _standing(log, end)
        assert ((now["hw_t"] <= end + 12 * hour) & (now["upper"] >= boards)).any()
        return
    closed = int(ep["closed_at"])
    assert closed > _utc(crossed["last"]).timestamp()
    standing = _standing(log, closed)
    within = standing[(standing["hw_t"] > closed) & (standing["hw_t"] <= closed + 12 * hour)]
    assert len(within) and (within["upper"] < boards).all(), within


@pytest.mark.slow
def test_demo_tells_the_volunteers_about_the_quay(demo):
    to_volunteers = [m for m in demo["summary"].mail if "volunteers@dunmerrow.example" in m.recipients]
    assert any("boards out" in m.subject.lower() for m in to_volunteers)
    assert any("not clear yet" in m.subject.lower() or "all clear" in m.subject.lower() for m in to_volunteers)


@pytest.mark.slow
def test_demo_every_level_in_emails_and_reports_is_on_chart_datum(demo):
    # One display datum per station (chart datum, given in demo/config.toml): every level a
    # reader sees is named, and named the same. Residuals carry a sign and no datum.
    import email
    import email.policy
    import re

    texts = []
    for m in demo["summary"].mail:
        msg = email.message_from_bytes(m.path.read_bytes(), policy=email.policy.default)
        texts.append(msg["Subject"] + "\n" + msg.get_body(("plain",)).get_content())
    texts += [p.read_text() for p in demo["summary"].reports if p.name != "index.html"]
    for text in texts:
        named = re.findall(r"\d\.\d\d m above ([a-z ]*?datum)", text)
        assert set(named) <= {"chart datum"}, set(named)
    levels = [t for t in texts[: len(demo["summary"].mail)] if "water level" in t]
    assert levels and all("above chart datum" in t for t in levels)


@pytest.mark.slow
def test_demo_sends_no_message_for_the_spikes(demo):
    # The first spike alone reaches above the boards-out level on 21 Oct. Had it opened an
    # episode there would be two "boards out" openings per recipient; there is one.
    openings = [m for m in demo["summary"].mail if ": boards out - " in m.subject.lower()]
    assert sorted(r for m in openings for r in m.recipients) == [
        "harbour-office@dunmerrow.example", "volunteers@dunmerrow.example"]


@pytest.mark.slow
def test_demo_surge_episodes_follow_both_surge_peaks(demo):
    import pandas as pd

    eps = _episodes(demo, "surge")
    assert len(eps) == 2 and all(e["closed_at"] for e in eps)
    for ep, key in zip(eps, ("first_peak", "main_peak")):
        peak = _utc(demo["truth"]["storm"][key]["time"])
        opened = pd.Timestamp(ep["opened_at"], unit="s", tz="UTC")
        closed = pd.Timestamp(ep["closed_at"], unit="s", tz="UTC")
        assert opened < peak < closed


@pytest.mark.slow
def test_demo_every_email_and_report_carries_the_caution(demo):
    s = demo["summary"]
    assert s.mail and s.reports
    assert s.caution_missing == []


@pytest.mark.slow
def test_demo_writes_the_storm_day_report(demo):
    names = [p.name for p in demo["summary"].reports]
    assert "2025-10-22.html" in names and "index.html" in names


@pytest.mark.slow
def test_demo_finds_the_surge_peak(demo):
    import pandas as pd

    main = demo["truth"]["storm"]["main_peak"]
    t, value = demo["summary"].surge_peak
    # Injected weather noise (2 cm) and the fitted tide's error (about 1 cm rms) move the peak:
    # 10 cm in height; the pulse is 5 h wide and the residual is smoothed, so 90 min in time.
    assert value == pytest.approx(main["surge"], abs=10 * cm)
    assert abs(t - _utc(main["time"])) <= pd.Timedelta(90 * minute, "s")


@pytest.mark.slow
def test_demo_finds_the_highest_water(demo):
    import pandas as pd

    truth = demo["truth"]
    t, level = demo["summary"].highest
    want = truth["storm"]["highest_level"]
    chart = truth["datums"]["chart_datum_above_station_datum"]
    # Sensor noise 4 mm and one-minute steps (generate.py): 1 cm and 15 minutes.
    assert level == pytest.approx(want["level"] - chart, abs=1 * cm)
    assert abs(t - _utc(want["time"])) <= pd.Timedelta(15 * minute, "s")


@pytest.mark.slow
def test_demo_finds_the_injected_spikes(demo):
    import pandas as pd

    f = demo["truth"]["faults"]
    found = demo["summary"].spikes
    for spike in f["spikes"]:
        assert any(abs(t - _utc(spike["time"])) <= pd.Timedelta(1 * minute, "s") for t in found), spike
    # Anything else flagged is where the stuck sensor let go: a real jump, not a false alarm.
    freed = _utc(f["flat_line"]["end"])
    for t in found:
        near_spike = any(abs(t - _utc(x["time"])) <= pd.Timedelta(1 * minute, "s") for x in f["spikes"])
        assert near_spike or abs(t - freed) <= pd.Timedelta(2 * minute, "s"), t


@pytest.mark.slow
def test_demo_finds_the_stuck_sensor(demo):
    import pandas as pd

    f = demo["truth"]["faults"]["flat_line"]
    ((start, end),) = demo["summary"].flat
    # QC calls a run flat once it has lasted 30 minutes (monitor.quality.checks.QcSettings, common practice).
    assert _utc(f["start"]) + pd.Timedelta(25 * minute, "s") <= start <= _utc(f["start"]) + pd.Timedelta(35 * minute, "s")
    assert abs(end - _utc(f["end"])) <= pd.Timedelta(2 * minute, "s")


@pytest.mark.slow
def test_demo_finds_the_gap(demo):
    import pandas as pd

    f = demo["truth"]["faults"]["gap"]
    ((before, after),) = demo["summary"].gaps
    assert before == _utc(f["start"]) - pd.Timedelta(1 * minute, "s")
    assert after == _utc(f["end"]) + pd.Timedelta(1 * minute, "s")


@pytest.mark.slow
def test_demo_finds_the_backup_drift(demo):
    d = demo["summary"].drift
    want = -demo["truth"]["faults"]["drift"]["mm_per_day"]  # primary - backup
    # Two and a half days of 5 mm noise: the 95% interval holds the truth, the estimate
    # within 1 mm/day.
    assert d["drift_low"] <= want <= d["drift_high"]
    assert d["drift_mm_per_day"] == pytest.approx(want, abs=1.0)


@pytest.mark.slow
def test_demo_finds_the_backup_clock_offset(demo):
    import pandas as pd

    f = demo["truth"]["faults"]["clock_offset"]
    (span,) = demo["summary"].clock
    # 15-second lag grid over 6-hour windows stepped by 3 hours (monitor.demo.sensor_timing):
    # the lag within 1 minute. One lag per window, and a window partly late may come out
    # either way (here the one from 09:00 UTC, late from 12:20 on, came out late),
    # so the span's ends are known to within a window, 6 hours; the span covers the truth's
    # middle. (Windows on a grid in UTC since the timing windows are kept between runs;
    # before, on a grid from the record's first sample, the ends fell within 3 hours here.)
    truth0, truth1 = _utc(f["start"]), _utc(f["end"])
    assert span["lag_min"] == pytest.approx(f["minutes_late"], abs=1.0)
    assert abs(span["start"] - truth0) <= pd.Timedelta(6 * hour, "s")
    assert abs(span["end"] - truth1) <= pd.Timedelta(6 * hour, "s")
    assert span["start"] <= truth0 + (truth1 - truth0) / 2 <= span["end"]


@pytest.mark.slow
def test_demo_leaves_the_live_page_as_at_the_end_of_the_storm(demo):
    import json

    from monitor.demo import replay_window

    live = demo["out"] / "live"
    doc = json.loads((live / "dunmerrow.json").read_text())
    _, end = replay_window(demo["truth"], short=True)
    # the replay runs on its own clock: at its end the last sample is fresh, within a minute of the end
    assert doc["stale"] is False
    assert end.timestamp() - 2 * minute <= doc["last_sample_t"] <= end.timestamp()
    # the port's own levels (demo/port.toml), on chart datum
    assert [(m["name"], round(m["level"], 3), m["side"]) for m in doc["marks"]] == [
        ("quay top", 4.25, "above"), ("boards out", 4.0, "above"), ("lock sill", -0.9, "below")]
    assert doc["forecast"] is not None and doc["forecast"]["lower"] < doc["forecast"]["upper"]
    html = (live / "dunmerrow.html").read_text()
    assert "Official warnings and the local emergency authorities come first" in html
    assert 'href="dunmerrow.html"' in (live / "index.html").read_text()
