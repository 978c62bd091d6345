"""The report's clock diagnostics: the figure shown is the chart's last point (an invented port)."""
from __future__ import annotations

import datetime as dt

import numpy as np
import pandas as pd
import pytest

from alerts.reports.model import day_bounds
from monitor.service.reporting import gather_day
from monitor.store.database import Store
from predictor import TideModel
from units import mm

TZ = "Atlantic/Faroe"
DAY = dt.date(2024, 3, 12)


class Station:
    """The few station attributes gather_day reads."""
    id, name, tz, note = "skq", "Skerrin Quay", TZ, ""
    datums = {"chart": 0.5}
    sensors = {"primary": {}, "backup": {}}
    rules = ()


@pytest.fixture(scope="module")
def report(tmp_path_factory):
    folder = tmp_path_factory.mktemp("port")
    model = TideModel(mean=2.60, constituents=[{"name": "M2", "amplitude": 1.35, "phase": 40.0},
                                               {"name": "K1", "amplitude": 0.20, "phase": 120.0}])
    start, end = day_bounds(DAY, TZ)
    times = pd.date_range(end - pd.Timedelta(days=28), end, freq="6min", inclusive="left")
    rng = np.random.default_rng(7)
    # The primary's clock drifts from 0 to 3 minutes late over the four weeks (invented); the
    # backup keeps time, then runs 4 minutes ahead in the last week.
    drift = pd.to_timedelta(np.linspace(0.0, 3.0, len(times)), unit="min")
    primary = model.predict(times - drift) + rng.normal(0, 5 * mm, len(times))
    ahead = pd.to_timedelta(np.where(times >= end - pd.Timedelta(days=7), 4.0, 0.0), unit="min")
    backup = model.predict(times - ahead) + rng.normal(0, 5 * mm, len(times))
    with Store.open(folder / "port.db") as store:
        t = times.as_unit("s").asi8
        store.write_batch("skq", "primary", t, primary)
        store.write_batch("skq", "backup", t, backup)
        yield gather_day(store, Station(), DAY, model=model, model_source="constants file",
                         now=end + pd.Timedelta(hours=6))


@pytest.mark.parametrize("name", ["Clock offset against the predicted tide", "Backup clock against the primary",
                                  "Primary minus backup: drift"])
def test_latest_figure_is_the_charts_last_point(report, name):
    d = next(x for x in report.diagnostics if x.name == name)
    last = d.history.dropna()
    assert len(last) >= 2
    assert d.value == pytest.approx(float(last.iloc[-1]), abs=1e-9)
    assert last.index[-1] == last.index.max()
