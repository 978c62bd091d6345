"""Report extras gathered from a real store: next high water forecast, inverse-barometer share of
the residual, and the Van de Casteele tide-staff check (an invented port, invented numbers)."""
from __future__ import annotations

import datetime as dt

import numpy as np
import pandas as pd
import pytest

from alerts.reports.model import day_bounds
from monitor.quality.records import add_staff_reading
from monitor.service.reporting import barometric_share, gather_day
from monitor.store.database import Store
from predictor import TideModel
from units import mm, minute

TZ = "Atlantic/Faroe"
DAY = dt.date(2024, 3, 12)
CHART = 0.50     # chart datum 0.50 m above the station datum (invented)
SURGE = 0.05     # m of residual that is not the barometer's
OFFSET = 0.014   # the gauge reads 14 mm above the staff (invented)


class Station:
    """The few station attributes gather_day reads."""
    id, name, tz, note = "skq", "Skerrin Quay", TZ, ""
    datums = {"chart": CHART}
    sensors = {"primary": {}}
    rules = ()


def pressure(times: pd.DatetimeIndex) -> np.ndarray:
    """An invented depression: 20 hPa below the standard atmosphere at its deepest [hPa]."""
    hours = np.asarray((times - times[0]) / pd.Timedelta(hours=1), dtype=float)
    return 1013.25 - 20.0 * np.sin(np.pi * hours / hours[-1])


@pytest.fixture(scope="module")
def site(tmp_path_factory):
    folder = tmp_path_factory.mktemp("port")
    model = TideModel(mean=2.60, constituents=[{"name": "M2", "amplitude": 1.35, "phase": 40.0}])
    start, end = day_bounds(DAY, TZ)
    times = pd.date_range(start - pd.Timedelta(days=1), end + pd.Timedelta(days=1), freq="6min", inclusive="left")
    predicted = model.predict(times)
    # Inverse barometer, written out by hand: about 1 cm per hPa below the reference
    # (Pugh & Woodworth 2014, ch. 7): 20 hPa low is +0.20 m.
    ib = -0.01 * (pressure(times) - 1013.25)
    observed = predicted + ib + SURGE
    store = Store.open(folder / "port.db")
    store.write_batch("skq", "primary", times.as_unit("s").asi8, observed)
    store.write_derived("skq", pd.DataFrame({"observed": observed, "predicted": predicted,
                                             "residual": observed - predicted, "smoothed": observed - predicted,
                                             "barometric": ib}, index=times))
    # A staff session: 13 readings half an hour apart over a tide; the staff shows the true sea.
    staff_times = pd.date_range(start + pd.Timedelta(hours=6), periods=13, freq="30min")
    true = np.interp(staff_times.as_unit("s").asi8, times.as_unit("s").asi8, observed) - OFFSET
    for t, level in zip(staff_times, true):
        add_staff_reading(store, "skq", t.timestamp(), float(level), "harbour staff")
    yield store, model, start, end
    store.close()


@pytest.fixture(scope="module")
def report(site):
    store, model, start, end = site
    return gather_day(store, Station(), DAY, model=model, model_source="constants file",
                      now=end + pd.Timedelta(hours=6))


def test_staff_check_finds_the_gauge_offset(report):
    # Van de Casteele regression (IOC Manual Vol. IV): intercept = gauge - staff.
    assert report.staff.offset_mm == pytest.approx(OFFSET / mm, abs=1.0)


def test_staff_check_finds_no_scale_or_timing_error(report):
    assert report.staff.scale_error == pytest.approx(0.0, abs=0.002)
    assert abs(report.staff.timing_s) < 1 * minute


def test_staff_diagram_points_are_on_the_report_datum(report):
    # Staff readings are on the station datum; chart datum lies CHART above it.
    assert report.staff.readings == 13 and len(report.staff.points) == 13
    assert report.staff.points["staff"].max() < 2.60 + 1.35 + 0.3 - CHART


def test_barometer_explains_the_residual_it_made(report):
    b = report.barometer
    assert b.variance_explained == pytest.approx(1.0, abs=1e-6)
    assert b.mean_residual - b.mean_ib == pytest.approx(SURGE, abs=1 * mm)


def test_day_mean_inverse_barometer_matches_the_pressure(report):
    start, end = day_bounds(DAY, TZ)
    day = pd.date_range(start - pd.Timedelta(days=1), end + pd.Timedelta(days=1), freq="6min", inclusive="left")
    ib = -0.01 * (pressure(day) - 1013.25)  # 1 cm per hPa, Pugh & Woodworth (2014) ch. 7
    inside = (day >= start) & (day < end)
    assert report.barometer.mean_ib == pytest.approx(ib[inside].mean(), abs=1 * mm)


def test_forecast_is_predicted_high_water_plus_current_residual(report, site):
    # Persistence of the surge (common practice, no source): forecast = predicted HW + residual now.
    _, model, _, end = site
    w = report.forecast
    assert w.forecast == pytest.approx(w.predicted + w.residual_now, abs=1 * mm)
    highs = model.high_low(end - pd.Timedelta(hours=1), end + pd.Timedelta(hours=14))
    first = highs[highs["kind"] == "high"].iloc[0]
    assert abs((w.time - pd.Timestamp(first["time"]).tz_convert("UTC")).total_seconds()) < 1 * minute
    assert w.predicted == pytest.approx(float(first["level"]) - CHART, abs=1 * mm)


def test_short_history_gives_a_wide_range_and_says_so(report):
    # Three days of history hold no storm: the range is the wide rule of thumb, said in words,
    # and at least +-0.25 m plus half the surge about the forecast (monitor.surge.forecast).
    w = report.forecast
    assert w.method == "wide" and "WIDE RANGE" in w.note and "only 0 storms" in w.note
    assert w.lower <= w.forecast - 0.25 - 0.5 * abs(w.residual_now) + 1 * mm
    assert w.upper >= w.forecast + 0.25 + 0.5 * abs(w.residual_now) - 1 * mm


def test_stored_forecast_of_the_daemon_is_preferred(site):
    store, model, start, end = site
    hw_t = int((end + pd.Timedelta(hours=3)).timestamp())
    store.write_forecast("skq", {"hw_t": hw_t, "made_t": int(end.timestamp()) - 600, "predicted_high": 4.00,
                                 "residual_now": 0.30, "forecast": 4.30, "lower": 4.10, "upper": 4.60,
                                 "coverage": 0.9, "note": "from the daemon"})
    try:
        report = gather_day(store, Station(), DAY, model=model, model_source="constants file",
                            now=end + pd.Timedelta(hours=6))
    finally:
        store.conn.execute("DELETE FROM hw_forecasts")
    w = report.forecast
    assert (w.forecast, w.lower, w.upper) == pytest.approx((4.30 - CHART, 4.10 - CHART, 4.60 - CHART), abs=1 * mm)
    assert w.note == "from the daemon"


def test_variance_explained_of_independent_equal_parts_is_a_half():
    # Variances of independent components add, so IB carrying half the variance explains half.
    rng = np.random.default_rng(7)
    ib = rng.normal(0, 0.1, 20000)
    share = barometric_share(ib + rng.normal(0, 0.1, 20000), ib)
    assert share["variance_explained"] == pytest.approx(0.5, abs=0.02)


def test_a_past_days_report_shows_the_forecast_issued_that_day_not_a_later_one(site):
    # Reports written after the fact took "now": the 22 October report showed 27 October's forecast.
    store, model, start, end = site
    day_t, later_t = int(end.timestamp()) - 600, int(end.timestamp()) + 5 * 86400
    for made, level in ((day_t, 4.30), (later_t, 3.10)):
        store.write_forecast("skq", {"hw_t": made + 3 * 3600, "made_t": made, "predicted_high": level - 0.3,
                                     "residual_now": 0.30, "forecast": level, "lower": level - 0.2,
                                     "upper": level + 0.3, "coverage": 0.9, "note": "from the daemon"})
    try:
        report = gather_day(store, Station(), DAY, model=model, model_source="constants file",
                            now=end + pd.Timedelta(days=6))
    finally:
        store.conn.execute("DELETE FROM hw_forecasts")
    w = report.forecast
    assert w.made_at == pd.Timestamp(day_t, unit="s", tz="UTC")
    assert w.forecast == pytest.approx(4.30 - CHART, abs=1 * mm)


def test_a_forecast_made_for_the_report_is_made_as_of_the_days_end(site):
    store, model, start, end = site
    report = gather_day(store, Station(), DAY, model=model, model_source="constants file",
                        now=end + pd.Timedelta(days=6))
    assert start <= report.forecast.made_at < end


def _log_forecast(store, hw_t, made_t, forecast, lower, upper):
    from monitor.surge import forecast as SF
    SF.ensure_forecast_schema(store.db)
    with store.transaction() as conn:
        SF.log_forecasts(conn, "skq", [{"hw_t": hw_t, "made_t": made_t, "predicted_high": forecast - 0.1,
                                        "residual_now": 0.1, "forecast": forecast, "lower": lower, "upper": upper,
                                        "coverage": 0.9, "method": "conditioned", "note": "logged"}])


def test_verification_table_shows_each_high_water_against_its_forecasts(site):
    from alerts.reports.render import render_day_html

    store, model, start, end = site
    base = gather_day(store, Station(), DAY, model=model, model_source="constants file", now=end)
    high = next(w for w in base.tides if w.kind == "high" and w.observed_level is not None)
    hw_t = int(high.predicted_time.timestamp())
    came = high.observed_level + CHART            # on the station datum, as the daemon logs forecasts
    # 6 h before: a range well below what came; 3 h before: one around it; 1 h before: none issued
    _log_forecast(store, hw_t, hw_t - 6 * 3600 - 300, came - 0.5, came - 0.7, came - 0.3)
    _log_forecast(store, hw_t, hw_t - 3 * 3600 - 200, came - 0.05, came - 0.2, came + 0.1)
    _log_forecast(store, hw_t, hw_t - 2 * 3600 - 900, came + 0.5, came + 0.3, came + 0.7)  # 2.25 h before: neither
    try:
        report = gather_day(store, Station(), DAY, model=model, model_source="constants file", now=end)
    finally:
        store.conn.execute("DELETE FROM hw_forecast_log")
    row = next(v for v in report.verification if v.time == high.predicted_time)
    six, three, one = row.forecasts
    assert (six.lead_h, three.lead_h, one) == (6, 3, None)
    assert six.forecast == pytest.approx(came - 0.5 - CHART, abs=1 * mm)
    assert (row.verdict(six), row.verdict(three)) == ("above", "inside")
    html = render_day_html(report)
    assert "forecast against what came" in html and "came above the range" in html and "none issued" in html
