"""The qc, staff and flag verbs against a real configuration file and store."""
from __future__ import annotations

import numpy as np
import pytest

from monitor.quality import checks as qc
from monitor.cli import main
from monitor.store.database import Store
from test_qc_synthetic import AMPS, MEAN, PHASES, record
from units import mm

CONFIG = """
[store]
path = "store.sqlite"

[[stations]]
id = "harbour"
name = "Invented Harbour"
latitude = 50.0
longitude = -5.0
tz = "Europe/Lisbon"
constants = "constants.toml"
datums = {{ chart = -0.5 }}

[stations.sensors.primary]
units = "m"

[stations.sensors.backup]
units = "m"

[stations.qc]
spike_fail = 0.2
{extra}
"""


def _constants() -> str:
    lines = [f"mean = {MEAN}", ""]
    for k in AMPS:
        lines += ["[[constituents]]", f'name = "{k}"', f"amplitude = {AMPS[k]}", f"phase = {PHASES[k]}", ""]
    return "\n".join(lines)


@pytest.fixture()
def station(tmp_path):
    # The synthetic tide has no nodal corrections, so the store gets the predictor's own
    # prediction plus noise; the faults are ours.
    from predictor import TideModel

    (tmp_path / "constants.toml").write_text(_constants())
    cfg = tmp_path / "quaywatch.toml"
    cfg.write_text(CONFIG.format(extra=""))
    model = TideModel.load(tmp_path / "constants.toml")
    noisy, _ = record(days=3, seed=60)
    noise = noisy - record(days=3, seed=60, red_sigma=0, white_sigma=0)[0]  # the coloured noise alone
    level = noise + model.predict(noise.index)
    level.iloc[1500] += 0.35
    with Store.open(tmp_path / "store.sqlite") as s:
        t = level.index.as_unit("s").asi8
        s.write_batch("harbour", "primary", t, level.to_numpy())
        s.write_batch("harbour", "backup", t, level.to_numpy() + np.random.default_rng(61).normal(0, 2 * mm, len(t)))
    return cfg, level


def test_qc_summary_names_tests_zone_and_the_spike_episode(station, capsys):
    cfg, level = station
    rc = main(["qc", str(cfg), "--station", "harbour", "--from", "2024-03-01T00:00Z", "--to", "2024-03-03T23:59Z"])
    out = capsys.readouterr().out
    assert rc == 0
    assert "times in Europe/Lisbon" in out
    from alerts.reports.model import QC_TEST_NAMES

    for test in qc.TESTS:   # named as the daily report names them
        assert QC_TEST_NAMES[test] in out
    for short in ("roc", "multi", "resid"):
        assert not any(ln.split()[:1] == [short] for ln in out.splitlines())
    # The worst episode (the spike with its two neighbours) is shown in local time.
    spike = level.index[1500].tz_convert("Europe/Lisbon")
    line = next(ln for ln in out.splitlines() if " fail " in ln and "spike and jump" in ln)
    first, last = line[:16], line[22:38]
    fmt = "%Y-%m-%d %H:%M"
    assert first <= spike.strftime(fmt) <= last and " WET" in line
    assert "clock offset" in out and "unofficial" in out


def test_flag_then_qc_keeps_the_override(station, capsys):
    cfg, level = station
    at = level.index[1500].strftime("%Y-%m-%dT%H:%MZ")
    assert main(["flag", str(cfg), "--station", "harbour", "--sensor", "primary", "--at", at, "--set", "3",
                 "--who", "tech A", "--why", "wave slop, checked on site"]) == 0
    main(["qc", str(cfg), "--station", "harbour", "--from", "2024-03-01T00:00Z", "--to", "2024-03-02T00:00Z"])
    with Store.open(cfg.parent / "store.sqlite") as s:
        f = s.conn.execute("SELECT flag FROM observations WHERE sensor='primary' AND t=?",
                           (int(level.index[1500].timestamp()),)).fetchone()
    assert f == (qc.SUSPECT,)


def test_staff_add_and_list(station, capsys):
    cfg, _ = station
    assert main(["staff", "add", str(cfg), "--station", "harbour", "--at", "2024-03-01T10:00",
                 "--reading", "2.5", "--who", "tech B", "--note", "calm"]) == 0
    assert main(["staff", "list", str(cfg), "--station", "harbour"]) == 0
    out = capsys.readouterr().out
    assert "2024-03-01 10:00 WET" in out and "tech B" in out and "2.500" in out


def test_bad_time_is_a_one_line_user_error(station, capsys):
    cfg, _ = station
    rc = main(["qc", str(cfg), "--station", "harbour", "--from", "yesterday-ish", "--to", "2024-03-02"])
    err = capsys.readouterr().err
    assert rc == 2 and "--from" in err and "Traceback" not in err


def test_unknown_sensor_for_flag_is_refused(station, capsys):
    cfg, _ = station
    rc = main(["flag", str(cfg), "--station", "harbour", "--sensor", "barometer", "--at", "2024-03-01T00:00Z",
               "--set", "4", "--who", "x", "--why", "y"])
    assert rc == 2 and "primary, backup" in capsys.readouterr().err


def test_bad_qc_key_in_config_is_reported_with_its_path(station, capsys, tmp_path):
    cfg, _ = station
    cfg.write_text(CONFIG.format(extra="spike_suspekt = 0.1"))
    rc = main(["qc", str(cfg), "--station", "harbour", "--from", "2024-03-01", "--to", "2024-03-02"])
    assert rc == 2 and "stations[0].qc.spike_suspekt: unknown key" in capsys.readouterr().err


def test_qc_shows_the_backup_clock_against_the_primary(tmp_path, capsys):
    # By construction the backup's clock runs 5 minutes ahead: at its stamp t it holds the sea
    # of t - 5 min. A late clock counts positive (monitor.quality.diagnostics.relative_clock), so -5 min.
    import pandas as pd

    from predictor import TideModel

    (tmp_path / "constants.toml").write_text(_constants())
    cfg = tmp_path / "quaywatch.toml"
    cfg.write_text(CONFIG.format(extra=""))
    model = TideModel.load(tmp_path / "constants.toml")
    noisy, _ = record(days=3, seed=62)
    idx = noisy.index
    lag = pd.Timedelta(minutes=5)
    with Store.open(tmp_path / "store.sqlite") as s:
        t = idx.as_unit("s").asi8
        s.write_batch("harbour", "primary", t, model.predict(idx))
        s.write_batch("harbour", "backup", t, model.predict(idx - lag)
                      + np.random.default_rng(63).normal(0, 2 * mm, len(t)))
    assert main(["qc", str(cfg), "--station", "harbour", "--from", "2024-03-01T00:00Z",
                 "--to", "2024-03-03T23:59Z"]) == 0
    line = next(ln for ln in capsys.readouterr().out.splitlines() if "backup clock vs primary" in ln)
    value = float(line.split("backup clock vs primary")[1].split()[0])
    assert value == pytest.approx(-5.0, abs=1.0)
