"""Daily reports from a real store: gathering, writing, scheduling, email queue, command line."""
from __future__ import annotations

import datetime as dt

import numpy as np
import pandas as pd
import pytest
import tomli_w

from alerts.reports.model import day_bounds

from alerts.reports.render import read_summary
from monitor.cli import main
from monitor.service.config import validate_config
from monitor.service.reporting import due_day, gather_day, low_water_differences, write_due_reports
from monitor.store.database import Store
from predictor import TideModel
from units import mm, minute

TZ = "Atlantic/Faroe"  # the invented port's zone (UTC+00:00 in winter)
DAY = dt.date(2024, 3, 12)
SURGE = 0.20  # m, a steady surge through the record
CHART = 0.50  # chart datum 0.50 m above the station datum (invented)


@pytest.fixture(scope="module")
def site(tmp_path_factory):
    """An invented port's configuration and store holding three days of 6-minute data."""
    folder = tmp_path_factory.mktemp("port")
    model = TideModel(mean=2.60, constituents=[{"name": "M2", "amplitude": 1.35, "phase": 40.0},
                                               {"name": "S2", "amplitude": 0.30, "phase": 75.0}])
    model.save(folder / "constants.toml")
    raw = {
        "store": {"path": "port.db"},
        "reports": {"folder": "reports", "write_at": "06:30", "recipients": ["harbour@port.invalid"]},
        "mail": {"sender": "gauge@port.invalid", "host": "127.0.0.1", "port": 2525, "security": "none"},
        "stations": [{
            "id": "skq", "name": "Skerrin <Quay>", "latitude": 61.2, "longitude": -6.9, "tz": TZ,
            "constants": "constants.toml", "datums": {"chart": CHART},
            "sensors": {"primary": {"units": "m", "line": {"delimiter": ",", "time_column": 1, "value_column": 2}}},
            "rules": [{"id": "quay", "when": "level_above", "datum": "chart", "notify": ["crew@port.invalid"],
                       "steps": [{"name": "apron wet", "at": 3.90}]}],
        }],
    }
    (folder / "config.toml").write_text(tomli_w.dumps(raw))
    config, errors = validate_config(raw, base_dir=folder, path=folder / "config.toml")
    assert errors == [], errors
    start, end = day_bounds(DAY, TZ)
    times = pd.date_range(start - pd.Timedelta(days=1), end + pd.Timedelta(days=1), freq="6min", inclusive="left")
    predicted = model.predict(times)
    observed = predicted + SURGE
    t = times.as_unit("s").asi8
    with Store.open(folder / "port.db") as store:
        store.write_batch("skq", "primary", t, observed)
        store.write_derived("skq", pd.DataFrame({"observed": observed, "predicted": predicted,
                                                 "residual": observed - predicted}, index=times))
    return config, folder, model


@pytest.fixture(scope="module")
def report(site):
    config, folder, _ = site
    with Store.open(folder / "port.db") as store:
        return gather_day(store, config.stations[0], DAY)


def test_every_high_water_shows_the_steady_surge_as_skew_surge(report):
    # Skew surge = highest observed in the cycle - predicted high water (Williams et al. 2016):
    # a steady surge raises every cycle's highest level by exactly itself.
    highs = [w for w in report.tides if w.kind == "high"]
    assert len(highs) == 2  # a semidiurnal tide has two high waters in most days
    for w in highs:
        assert w.skew == pytest.approx(SURGE, abs=2 * mm)
        assert abs((w.observed_time - w.predicted_time).total_seconds()) <= 6 * minute


def test_low_waters_show_the_surge_as_their_own_low_water_departure(report):
    # the skew surge is a high-water quantity; its low-water counterpart has its own name
    lows = [w for w in report.tides if w.kind == "low"]
    assert lows and all(w.low_departure == pytest.approx(SURGE, abs=2 * mm) for w in lows)
    assert all(w.skew is None for w in lows)


def test_levels_are_on_chart_datum(report, site):
    _, _, model = site
    first = report.samples.index[0]
    expected = float(model.predict(pd.DatetimeIndex([first]))[0]) + SURGE - CHART
    assert report.datum == "chart datum"
    assert report.samples["observed"].iloc[0] == pytest.approx(expected, abs=1 * mm)


def test_operator_level_is_drawn_on_chart_datum(report):
    (level,) = report.alert_levels
    assert (level.name, level.quantity, level.direction) == ("apron wet", "level", "above")
    assert level.value == pytest.approx(3.90, abs=1 * mm)


def test_constants_in_use_are_listed(report):
    assert [c.name for c in report.constants.constituents] == ["M2", "S2"]
    assert "constants.toml" in report.constants.source


def test_constants_mean_is_on_the_report_datum(report):
    # The file's mean 2.60 m is on the station datum; chart datum is 0.50 m above it.
    assert report.constants.mean == pytest.approx(2.60 - CHART, abs=0.1 * mm)


def test_a_level_rules_peak_is_on_the_report_datum_and_a_surges_keeps_its_sign(site):
    config, folder, _ = site
    with Store.open(folder / "port.db") as store:
        from alerts.engine import ensure_alert_schema

        ensure_alert_schema(store.db)
        start, _ = day_bounds(DAY, TZ)
        t = int(start.timestamp()) + 3600
        rows = [("skq", "quay", "level_above", "chart", "m", t, t + 600, "apron wet", 3.95),
                ("skq", "keel", "level_above", "station", "m", t, t + 600, "deep", 4.45),
                ("skq", "surge", "residual_above", "station", "m", t, t + 600, "raised", 0.42)]
        store.conn.executemany(
            "INSERT INTO alert_episodes (station, rule, watch, datum, unit, opened_at, closed_at, top_step, peak,"
            " messages) VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, 0)", rows)
        try:
            report = gather_day(store, config.stations[0], DAY)
        finally:
            store.conn.execute("DELETE FROM alert_episodes")
    peaks = {a.rule: (a.peak, a.signed) for a in report.alerts}
    assert peaks["quay"] == (pytest.approx(3.95, abs=0.1 * mm), False)            # already on chart datum
    assert peaks["keel"] == (pytest.approx(4.45 - CHART, abs=0.1 * mm), False)    # station datum moved to chart
    assert peaks["surge"] == (pytest.approx(0.42, abs=0.1 * mm), True)            # datum-free


def test_report_html_names_the_datum_beside_the_levels(site):
    from alerts.reports.render import render_day_html

    config, folder, _ = site
    with Store.open(folder / "port.db") as store:
        html = render_day_html(gather_day(store, config.stations[0], DAY))
    assert "Levels in metres above chart datum" in html
    assert "Mean level 2.100 m above chart datum" in html


def test_display_datum_of_the_configuration_is_used(site):
    config, folder, model = site
    import dataclasses

    station = dataclasses.replace(config.stations[0], display_datum="station")
    with Store.open(folder / "port.db") as store:
        report = gather_day(store, station, DAY)
    first = report.samples.index[0]
    assert report.datum == "station datum"
    assert report.samples["observed"].iloc[0] == pytest.approx(
        float(model.predict(pd.DatetimeIndex([first]))[0]) + SURGE, abs=1 * mm)


def test_low_water_difference_of_a_shifted_record():
    times = pd.date_range("2024-03-12", periods=300, freq="6min", tz="UTC")
    level = pd.Series(2.0 + np.cos(np.linspace(0, 4 * np.pi, 300)), index=times)
    extremes = pd.DataFrame({"time": [times[0], times[75], times[150]], "level": [3.0, 1.0, 3.0],
                             "kind": ["high", "low", "high"]})
    table = low_water_differences(level - 0.1, extremes)
    assert table["difference"].iloc[0] == pytest.approx(-0.1, abs=1 * mm)


def test_report_is_due_after_the_local_write_time():
    write_at = dt.time(6, 30)
    # Faroe summer time is UTC+01:00: 05:40 UTC is 06:40 local on 2 July.
    assert due_day(pd.Timestamp("2024-07-02 05:40", tz="UTC"), TZ, write_at) == dt.date(2024, 7, 1)
    assert due_day(pd.Timestamp("2024-07-02 05:20", tz="UTC"), TZ, write_at) == dt.date(2024, 6, 30)


def test_scheduled_report_is_written_and_queued_once(site):
    config, folder, _ = site
    now = pd.Timestamp("2024-03-13 07:00", tz=TZ).tz_convert("UTC")
    with Store.open(folder / "port.db") as store:
        first = write_due_reports(config, store, now)
        again = write_due_reports(config, store, now + pd.Timedelta(minutes=10))
        queued = store.db.conn.execute("SELECT kind, recipient, key, html FROM outbox").fetchall()
    assert [p.name for p in first] == ["2024-03-12.html"] and again == []
    assert [(k, r, key) for k, r, key, _ in queued] == [("report", "harbour@port.invalid", "report/skq/2024-03-12")]
    assert "Skerrin &lt;Quay&gt;" in queued[0][3]
    assert (folder / "reports" / "index.html").exists()


def test_command_writes_the_report(site, capsys):
    config, folder, _ = site
    assert main(["report", str(folder / "config.toml"), "--station", "skq", "--date", "2024-03-11"]) == 0
    path = folder / "reports" / "skq" / "2024-03-11.html"
    assert capsys.readouterr().out.strip() == str(path)
    assert read_summary(path)["highest_residual"] == pytest.approx(SURGE, abs=1 * mm)


def test_command_refuses_a_bad_date(site, capsys):
    _, folder, _ = site
    assert main(["report", str(folder / "config.toml"), "--station", "skq", "--date", "12/03/2024"]) == 2
    assert "--date '12/03/2024': expected a date as YYYY-MM-DD" in capsys.readouterr().err


def test_command_refuses_an_unknown_station(site, capsys):
    _, folder, _ = site
    assert main(["report", str(folder / "config.toml"), "--station", "nowhere"]) == 2
    assert "--station 'nowhere': no such station" in capsys.readouterr().err
