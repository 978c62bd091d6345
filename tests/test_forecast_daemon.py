"""The daemon's high water forecasts (monitor.service.daemon with monitor.surge.forecast), in process:
a range conditioned on the storm when the station's history holds enough storms, the wide
rule said in words when it does not, a barometer gap said in words, every high water within
the rules' horizon forecast and logged. An invented port with invented storms."""
from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from predictor import TideModel
from units import hour, day

NOW = 1_767_225_600            # 2026-01-01T00:00Z (invented)
STEP = 600                     # the history's step [s]
MODEL = TideModel(mean=3.0, constituents=[{"name": "M2", "amplitude": 1.2, "phase": 30.0}], datum="station")


def _history(days: float, storms: int, seed: int = 5) -> pd.DataFrame:
    """An invented smoothed residual: calm red noise with ``storms`` bell-shaped surges."""
    rng = np.random.default_rng(seed)
    t = np.arange(NOW - days * day, NOW - 6 * hour, STEP)
    r = np.convolve(rng.normal(0, 0.01, len(t)), np.ones(36) / 6, mode="same")
    for c in np.linspace(t[0] + 3 * day, t[-1] - 3 * day, storms):
        r += rng.uniform(0.5, 1.1) * np.exp(-0.5 * ((t - c) / (rng.uniform(4, 10) * hour)) ** 2)
    return pd.DataFrame({"t": t, "r": r})


def _site(tmp_path, history: pd.DataFrame, barometer: bool = True):
    from monitor.service.config import validate_config
    from monitor.service.daemon import Daemon
    from monitor.store.database import Store

    MODEL.save(tmp_path / "c.toml")
    sensors = {"primary": {}}
    if barometer:
        sensors["barometer"] = {}
    raw = {"store": {"path": "q.db"}, "residual": {"median_minutes": 11, "mean_minutes": 10},
           "mail": {"sender": "g@port.invalid", "save_dir": "mail"},
           "stations": [{"id": "port", "latitude": 54.0, "longitude": -10.0, "constants": "c.toml",
                         "datums": {"chart": 1.0}, "sensors": sensors,
                         "rules": [{"id": "quay", "when": "level_above", "datum": "chart", "hold": 0,
                                    "notify": ["v@port.invalid"], "steps": [{"name": "boards out", "at": 9.0}],
                                    "clear_horizon": "24h"}]}]}
    cfg, errors = validate_config(raw, tmp_path)
    assert errors == [], errors
    store = Store.open(cfg.store_path)
    idx = pd.DatetimeIndex(pd.to_datetime(history["t"].to_numpy(), unit="s", utc=True))
    pred = MODEL.predict(idx)
    r = history["r"].to_numpy()
    store.write_derived("port", pd.DataFrame({"observed": pred + r, "predicted": pred, "residual": r,
                                              "smoothed": r}, index=idx))
    # what came at each predicted high water: the residual then, and a little more (the cycle's top)
    ext = MODEL.high_low(idx[0], idx[-1])
    highs = ext[ext["kind"] == "high"]
    hw_t = highs["time"].map(pd.Timestamp.timestamp).to_numpy()
    skew = np.interp(hw_t, history["t"], r) + 0.02
    store.write_skew_surges("port", pd.DataFrame({"hw_t": hw_t.astype(int), "predicted_high": highs["level"].to_numpy(),
                                                  "observed_high": highs["level"].to_numpy() + skew,
                                                  "observed_t": hw_t.astype(int), "skew_surge": skew}))
    return cfg, store, Daemon(cfg, store)


def _storm_now(d, pressure_until: int | None = None):
    """The last six hours: the surge rising 0.1 m an hour to +0.6 m; pressure falling until ``pressure_until``."""
    from monitor.service.daemon import ingest_lines

    st = d.cfg.stations[0]
    t = np.arange(NOW - 6 * hour, NOW + 1, 60)
    level = MODEL.predict(t.astype("datetime64[s]")) + 0.1 * (t - t[0]) / hour
    ingest_lines(d.store, st.sensors["primary"], [f"{pd.Timestamp(x, unit='s'):%Y-%m-%dT%H:%M:%SZ},{v:.3f}"
                                                  for x, v in zip(t, level)], received=NOW)
    if "barometer" in st.sensors:
        tp = t[::10] if pressure_until is None else t[::10][t[::10] <= pressure_until]
        ingest_lines(d.store, st.sensors["barometer"], [f"{pd.Timestamp(x, unit='s'):%Y-%m-%dT%H:%M:%SZ},"
                                                        f"{1000 - 2 * (x - t[0]) / hour:.1f}" for x in tp],
                     received=NOW)
    d.process_station(d.stations["port"], now=NOW)


def _log(store):
    """The forecasts issued last (at the end of the processed window), next high water first."""
    return pd.read_sql_query("SELECT * FROM hw_forecast_log WHERE made_t = (SELECT max(made_t) FROM "
                             "hw_forecast_log) ORDER BY hw_t", store.conn)


def test_enough_storms_give_a_range_conditioned_on_the_storm_now(tmp_path):
    cfg, store, d = _site(tmp_path, _history(540, 30))
    with store:
        _storm_now(d)
        log = _log(store)
    assert len(log) >= 1 and set(log["method"]) == {"conditioned"}
    fc = log.iloc[0]
    assert "conditioned on the state now" in fc["note"] and "Lei et al. 2018" in fc["note"]
    assert fc["rate"] == pytest.approx(0.1, abs=0.01)
    assert fc["lower"] < fc["forecast"] < fc["upper"]
    assert fc["rising"] > fc["persistence"]


def test_a_storm_widens_the_range_that_calm_would_give(tmp_path):
    from monitor.surge import forecast as SF
    cfg, store, d = _site(tmp_path, _history(540, 30))
    with store:
        grid, skew, p = SF.read_history(store.conn, "port", NOW - 540 * day, NOW, barometer=False)
    f = SF.SurgeForecaster.learn(grid, skew, None, min_storms=20)
    calm = f.forecast(SF.StormState(t=NOW, residual=0.02, rate=0.0), NOW + 8 * hour, 3.0)
    storm = f.forecast(SF.StormState(t=NOW, residual=0.6, rate=0.1), NOW + 8 * hour, 3.0)
    assert calm["method"] == storm["method"] == "conditioned"
    assert storm["upper"] - storm["lower"] > 3 * (calm["upper"] - calm["lower"])


def test_too_few_storms_give_the_wide_range_said_in_words(tmp_path):
    cfg, store, d = _site(tmp_path, _history(200, 3))
    with store:
        _storm_now(d)
        log = _log(store)
    assert set(log["method"]) == {"wide"}
    # three storms in the history and the one rising now
    assert "WIDE RANGE" in log.iloc[0]["note"] and "only 4 storms" in log.iloc[0]["note"]


def test_a_barometer_gap_falls_back_to_no_pressure_and_says_so(tmp_path):
    cfg, store, d = _site(tmp_path, _history(540, 30))
    with store:
        _storm_now(d, pressure_until=NOW - 2 * hour)
        fc = _log(store).iloc[0]
    assert fc["tendency"] is None or np.isnan(fc["tendency"])
    assert fc["pressure_note"].startswith("barometer silent since") and "without the pressure tendency" in \
        fc["pressure_note"]


def test_every_high_water_within_the_horizon_is_forecast_and_kept(tmp_path):
    cfg, store, d = _site(tmp_path, _history(200, 3))
    with store:
        _storm_now(d)
        log = _log(store)
        latest = pd.read_sql_query("SELECT hw_t FROM hw_forecasts", store.conn)
    ext = MODEL.high_low(pd.Timestamp(NOW, unit="s", tz="UTC"), pd.Timestamp(NOW + 24 * hour, unit="s", tz="UTC"))
    want = sorted(int(t.timestamp()) for t in ext[ext["kind"] == "high"]["time"])
    assert sorted(log["hw_t"]) == pytest.approx(want, abs=60)
    assert set(log["hw_t"]) <= set(latest["hw_t"])


def test_a_long_window_is_forecast_through_its_half_hours(tmp_path):
    # Six hours processed at once: forecasts issued at each half hour, so the rules judge each
    # sample by the forecast of its own time (monitor.service.daemon._forecast).
    cfg, store, d = _site(tmp_path, _history(200, 3))
    with store:
        _storm_now(d)
        made = pd.read_sql_query("SELECT DISTINCT made_t FROM hw_forecast_log ORDER BY made_t", store.conn)["made_t"]
    assert len(made) >= 12 and made.diff().dropna().max() <= 1800 + 60
