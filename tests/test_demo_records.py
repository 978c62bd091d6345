"""`make demo-records` end to end: forty invented years ingested in one go, quality-controlled,
and analysed by the ``extremes`` verb; the 95 % bands of both routes must cover the levels the
generator's own process gives (its truth, by conditional Monte Carlo: sample_feeds/decades.py)
and the trend's interval the rise it put in (2.8 mm/year, invented)."""
from __future__ import annotations

import pytest

from monitor.demo_decades import run


@pytest.mark.slow
def test_demo_records_bands_cover_the_truth_and_the_trend_the_rise(tmp_path):
    res = run(tmp_path, quiet=True)
    lines = res["comparison"]
    assert len(lines) == 2 * 6 + 1, lines                 # six periods by two routes, and the trend
    assert not [line for line in lines if "NOT COVERED" in line], lines
    tr = res["result"]["sea_level"]["trend"]
    assert tr["step_handling"] == "corrected"
    assert abs(tr["rate_mm_per_year"] - res["truth"]["rise_mm_per_year"]) <= 1.96 * tr["se_mm_per_year"]
    assert (tmp_path / "extremes.txt").read_text().count("Automated and unofficial") == 1
