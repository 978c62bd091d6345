"""The daemon's refit never replaces good constants with worse ones.

A candidate fit is made without the days the constants in use have not seen, both hindcast
those days, and the candidate goes in use only when it does no worse. The sea is synthesised
by tests/reference_tide.py (no code shared with predictor/) for the invented port of
tests/test_short_records.py, with 3 cm of red noise.
"""
from __future__ import annotations

import numpy as np
import pytest
from scipy.signal import lfilter

import reference_tide as ref
from monitor.service.config import validate_config
from monitor.service.constants import model_to_text
from monitor.service.daemon import refit_station
from monitor.store.database import Store
from predictor import TideModel
from test_short_records import MEAN, SEA, START
from units import hour, day


@pytest.fixture()
def station(tmp_path):
    raw = {"store": {"path": "q.db"},
           "stations": [{"id": "testport", "latitude": 50.0, "longitude": -4.0, "constants": "history",
                         "fit_min_days": 5, "fit_span_days": 60, "datums": {"chart": -1.0},
                         "sensors": {"primary": {}}}]}
    cfg, errors = validate_config(raw, tmp_path)
    assert errors == []
    rng = np.random.default_rng(8)
    t = START + np.arange(0.0, 60 * day, 600.0)
    phi = np.exp(-600.0 / (6 * hour))
    red = lfilter([1.0], [1.0, -phi], rng.normal(0.0, 0.03 * np.sqrt(1 - phi**2), t.size))
    with Store.open(cfg.store_path) as store:
        store.write_batch("testport", "primary", t.astype(np.int64), ref.tide(t, MEAN, SEA) + red)
        yield store, cfg.stations[0]


def _in_use(store, st, constants, end_day):
    model = TideModel(mean=MEAN, constituents=[{"name": n, "amplitude": a, "phase": g}
                                              for n, (a, g) in constants.items()])
    return store.add_fit(st.id, fitted_at=int(START + end_day * day), start=int(START), end=int(START + end_day * day),
                         n=1000, rms=0.03, variance_explained=0.99, constants=model_to_text(model), in_use=True)


def test_a_candidate_that_hindcasts_worse_is_kept_out_of_use(station):
    # The port's true constants are in use; a refit of the last 16 days only (a week of it held
    # back to compare) cannot separate K1 from O1 (13.7 days) and hindcasts worse.
    store, st = station
    good = _in_use(store, st, SEA, 45)
    fit = refit_station(store, st, now=START + 60 * day, span_days=16)
    assert not fit["in_use"]
    assert fit["check"].startswith("not put in use, worse than the constants in use")
    assert store.fit_in_use(st.id)["id"] == good
    assert "hindcast" in store.fits(st.id).set_index("id").loc[fit["id"], "note"]


def test_a_candidate_that_hindcasts_better_replaces_poor_constants(station):
    # Constants with M2's phase 15 degrees off are in use: the refit does better on the days they
    # have not seen, and goes in use.
    store, st = station
    poor = dict(SEA, M2=(SEA["M2"][0], SEA["M2"][1] + 15.0))
    _in_use(store, st, poor, 45)
    fit = refit_station(store, st, now=START + 60 * day)
    assert fit["in_use"] and fit["check"].startswith("put in use")
    assert store.fit_in_use(st.id)["id"] == fit["id"]


def test_an_operator_can_still_force_a_fit_into_use(station):
    store, st = station
    _in_use(store, st, SEA, 45)
    fit = refit_station(store, st, now=START + 60 * day, span_days=16, use=True, force=True)
    assert fit["in_use"] and fit["check"] == ""
