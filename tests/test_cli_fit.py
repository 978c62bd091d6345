"""``quaywatch fit`` and its CSV reader: messages name file and line; JSON shape; TOML output."""
from __future__ import annotations

import argparse
import json
import re

import numpy as np
import pandas as pd
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from monitor.cli.fit import CAUTION, register
from monitor.feeds.csvfile import read_level_csv
from monitor.cli.errors import UserError
from monitor.errors import FeedError, MonitorError
from predictor import TideModel
from units import mm


# Invented port: amplitude [m] and Greenwich phase lag [deg]; P1 and K2 at their equilibrium
# ratios to K1 and S2 (0.331, 0.272: Cartwright & Tayler 1971, from memory), as a short record's
# fit infers them.
PORT = TideModel(mean=2.45, constituents=[
    {"name": "M2", "amplitude": 1.10, "phase": 95.0},
    {"name": "S2", "amplitude": 0.38, "phase": 128.0},
    {"name": "K2", "amplitude": 0.38 * 0.272, "phase": 128.0},
    {"name": "K1", "amplitude": 0.12, "phase": 205.0},
    {"name": "P1", "amplitude": 0.12 * 0.331, "phase": 205.0},
    {"name": "O1", "amplitude": 0.09, "phase": 350.0},
])


def run(argv):
    """Parse and run like ``monitor.cli.main``: a UserError or MonitorError becomes exit code 2."""
    parser = argparse.ArgumentParser(prog="quaywatch")
    register(parser.add_subparsers(dest="verb"))
    args = parser.parse_args(argv)
    try:
        return args.func(args)
    except (UserError, MonitorError) as exc:
        print(f"quaywatch {args.verb}: {exc}", file=__import__("sys").stderr)
        return 2


def write_csv(path, days=30, step="1h"):
    times = pd.date_range("2031-03-01", periods=int(pd.Timedelta(days=days) / pd.Timedelta(step)),
                          freq=step, tz="UTC")
    levels = PORT.predict(times)
    lines = ["time,level"] + [f"{t:%Y-%m-%dT%H:%M:%SZ},{v:.4f}" for t, v in zip(times, levels)]
    path.write_text("\n".join(lines) + "\n")
    return path


# ----------------------------------------------------------------- the reader


def test_reader_returns_utc_times_and_levels(tmp_path):
    p = tmp_path / "obs.csv"
    p.write_text("time,level\n2031-01-01T00:00:00Z,1.25\n2031-01-01T01:00:00+01:00,1.5\n")
    times, levels, notes = read_level_csv(p)
    # +01:00 local 01:00 is 00:00Z (ISO 8601 offsets); it duplicates the first row
    assert list(times) == [pd.Timestamp("2031-01-01T00:00Z")]
    assert "1 row(s) repeating" in notes[0]
    np.testing.assert_allclose(levels, [1.25])


def test_reader_sorts_and_says_so(tmp_path):
    p = tmp_path / "obs.csv"
    p.write_text("time,level\n2031-01-01T02:00Z,3\n2031-01-01T00:00Z,1\n2031-01-01T01:00Z,2\n")
    times, levels, notes = read_level_csv(p)
    np.testing.assert_allclose(levels, [1, 2, 3])
    assert any("out of time order; sorted" in n for n in notes)


def test_malformed_line_is_named_by_number(tmp_path):
    p = tmp_path / "obs.csv"
    p.write_text("time,level\n2031-01-01T00:00Z,1.0\n2031-01-01T01:00Z,1.1,extra\n")
    with pytest.raises(FeedError, match=r"obs\.csv line 3: expected two fields"):
        read_level_csv(p)


def test_non_numeric_level_is_named_by_line(tmp_path):
    p = tmp_path / "obs.csv"
    p.write_text("time,level\n2031-01-01T00:00Z,1.0\n\n2031-01-01T01:00Z,abc\n")
    with pytest.raises(FeedError, match=r"obs\.csv line 4: level 'abc' is not a number"):
        read_level_csv(p)


def test_bad_time_is_named_by_line(tmp_path):
    p = tmp_path / "obs.csv"
    p.write_text("time,level\n2031-13-01T00:00Z,1.0\n")
    with pytest.raises(FeedError, match=r"obs\.csv line 2: time '2031-13-01T00:00Z'"):
        read_level_csv(p)


def test_naive_times_are_refused_without_tz(tmp_path):
    p = tmp_path / "obs.csv"
    p.write_text("time,level\n2031-07-01T12:00:00,1.0\n")
    with pytest.raises(FeedError, match=r"obs\.csv line 2: .*has no zone.*--tz"):
        read_level_csv(p)


def test_naive_times_take_the_given_zone(tmp_path):
    # Lisbon keeps UTC+1 in July (summer time; from memory of the EU clock rules).
    p = tmp_path / "obs.csv"
    p.write_text("time,level\n2031-07-01T12:00:00,1.0\n")
    times, _, _ = read_level_csv(p, tz="Europe/Lisbon")
    assert times[0] == pd.Timestamp("2031-07-01T11:00Z")


def test_wrong_header_is_named(tmp_path):
    p = tmp_path / "obs.csv"
    p.write_text("when,height\n2031-01-01T00:00Z,1.0\n")
    with pytest.raises(FeedError, match=r"obs\.csv line 1: expected the header 'time,level'"):
        read_level_csv(p)


def test_missing_file_is_a_user_error(tmp_path):
    with pytest.raises(FeedError, match="no such file"):
        read_level_csv(tmp_path / "absent.csv")


@settings(max_examples=30, deadline=None)
@given(st.lists(st.tuples(st.integers(0, 10**9), st.floats(-10, 10, allow_nan=False)),
                min_size=1, max_size=30, unique_by=lambda r: r[0]))
def test_written_rows_read_back(tmp_path_factory, rows):
    p = tmp_path_factory.mktemp("csv") / "obs.csv"
    base = pd.Timestamp("2000-01-01T00:00Z")
    text = "time,level\n" + "".join(
        f"{(base + pd.Timedelta(seconds=s)).isoformat()},{v!r}\n" for s, v in rows)
    p.write_text(text)
    times, levels, _ = read_level_csv(p)
    rows = sorted(rows)
    assert [int((t - base).total_seconds()) for t in times] == [s for s, _ in rows]
    np.testing.assert_array_equal(levels, [v for _, v in rows])


# ----------------------------------------------------------------- the verb


def test_json_output_shape_and_values(tmp_path, capsys):
    obs = write_csv(tmp_path / "obs.csv", days=30)
    assert run(["fit", str(obs), "--json"]) == 0
    out = json.loads(capsys.readouterr().out)
    assert out["mean"] == pytest.approx(2.45, abs=1 * mm)
    m2 = next(c for c in out["constituents"] if c["name"] == "M2")
    assert {"name", "amplitude", "phase", "amplitude_ci", "phase_ci", "snr"} <= set(m2)
    assert m2["amplitude"] == pytest.approx(1.10, abs=1 * mm)
    assert {"rms", "variance_explained", "record_start", "record_end", "n_samples"} <= set(out)
    assert out["caution"] == CAUTION


def _noisy_csv(path, days=30, noise=0.05, seed=3):
    """The invented port with white noise [m] added (fixed seed)."""
    times = pd.date_range("2031-03-01", periods=days * 24, freq="1h", tz="UTC")
    levels = PORT.predict(times) + np.random.default_rng(seed).normal(0.0, noise, len(times))
    lines = ["time,level"] + [f"{t:%Y-%m-%dT%H:%M:%SZ},{v:.4f}" for t, v in zip(times, levels)]
    path.write_text("\n".join(lines) + "\n")
    return path


def test_printout_has_units_and_the_caution(tmp_path, capsys):
    obs = write_csv(tmp_path / "obs.csv", days=30)
    assert run(["fit", str(obs)]) == 0
    text = capsys.readouterr().out
    assert "Amplitudes in metres and phases in degrees" in text and "Greenwich" in text
    assert "unofficial" in text


def test_printout_groups_constituents_by_band(tmp_path, capsys):
    assert run(["fit", str(_noisy_csv(tmp_path / "obs.csv"))]) == 0
    text = capsys.readouterr().out
    semi, diur = text.index("Twice a day (semidiurnal)"), text.index("Once a day (diurnal)")
    m2 = text.index("\n  M2 ")
    k1 = text.index("\n  K1 ")
    assert semi < m2 < diur < k1


def test_printout_shows_amplitude_and_phase_each_with_its_interval(tmp_path, capsys):
    assert run(["fit", str(_noisy_csv(tmp_path / "obs.csv"))]) == 0
    line = next(ln for ln in capsys.readouterr().out.splitlines() if ln.startswith("  M2 "))
    amp, phase = re.search(r"(\d+\.\d{3}) \u00b1 +(\d+\.\d{3}) m +(\d+\.\d) \u00b1 +(\d+\.\d)\u00b0",
                           line).group(1, 3)
    assert float(amp) == pytest.approx(1.10, abs=10 * mm)     # the invented port's M2
    assert float(phase) == pytest.approx(95.0, abs=2.0)


def test_printout_judges_in_plain_words(tmp_path, capsys):
    # 5 cm white noise: M2 (1.1 m) stands clear of it; a constituent the port does not have
    # (M4, zero amplitude) cannot be told from the noise
    assert run(["fit", str(_noisy_csv(tmp_path / "obs.csv"))]) == 0
    lines = capsys.readouterr().out.splitlines()
    assert next(ln for ln in lines if ln.startswith("  M2 ")).endswith("resolved")
    assert next(ln for ln in lines if ln.startswith("  M4 ")).endswith("too weak to tell from noise")
    assert not any("SNR" in ln for ln in lines)


def test_printout_ends_with_the_record_summary_and_the_caution(tmp_path, capsys):
    assert run(["fit", str(_noisy_csv(tmp_path / "obs.csv"))]) == 0
    text = capsys.readouterr().out
    summary = text.index("The record and the fit")
    assert summary > text.rindex("\n  M2 ") and summary > text.index("Once a day")
    assert "30.0 days, 720 samples" in text[summary:]
    assert text.rstrip().endswith(CAUTION)


def test_constants_file_loads_back(tmp_path, capsys):
    obs = write_csv(tmp_path / "obs.csv", days=30)
    toml = tmp_path / "port.toml"
    assert run(["fit", str(obs), "-o", str(toml), "--robust"]) == 0
    model = TideModel.load(toml)
    m2 = next(c for c in model.constituents if c["name"] == "M2")
    assert m2["amplitude"] == pytest.approx(1.10, abs=1 * mm)


def test_fit_records_the_datum_it_is_told(tmp_path, capsys):
    obs = write_csv(tmp_path / "obs.csv", days=30)
    toml = tmp_path / "port.toml"
    assert run(["fit", str(obs), "-o", str(toml), "--datum", "chart"]) == 0
    assert TideModel.load(toml).datum == "chart"
    assert run(["fit", str(obs), "-o", str(toml)]) == 0
    assert TideModel.load(toml).datum is None and "--datum" in capsys.readouterr().err


def test_too_short_record_gives_needed_lengths(tmp_path, capsys):
    obs = write_csv(tmp_path / "obs.csv", days=0.5, step="10min")
    assert run(["fit", str(obs)]) == 2
    err = capsys.readouterr().err
    assert "obs.csv" in err and "record too short" in err and "days for M2 alone" in err


def test_duplicates_are_reported_on_stderr(tmp_path, capsys):
    obs = write_csv(tmp_path / "obs.csv", days=30)
    lines = obs.read_text().splitlines()
    obs.write_text("\n".join(lines + lines[5:8]) + "\n")
    assert run(["fit", str(obs), "--json"]) == 0
    err = capsys.readouterr().err
    assert "3 row(s) repeating an earlier time dropped" in err


def test_unknown_zone_is_refused(tmp_path, capsys):
    obs = write_csv(tmp_path / "obs.csv", days=30)
    assert run(["fit", str(obs), "--tz", "Mars/Olympus"]) == 2
    assert "unknown time zone" in capsys.readouterr().err


def test_the_installed_command_line_has_the_fit_verb(tmp_path, capsys):
    from monitor.cli import main

    obs = write_csv(tmp_path / "obs.csv", days=30)
    assert main(["fit", str(obs), "--json"]) == 0
    assert json.loads(capsys.readouterr().out)["constituents"][0]["name"] == "M2"
    bad = tmp_path / "bad.csv"
    bad.write_text("time,level\n2031-01-01T00:00Z,x\n")
    assert main(["fit", str(bad)]) == 2
    assert "quaywatch fit: " in capsys.readouterr().err


def test_infer_auto_adds_p1_from_k1_and_says_so(tmp_path, capsys):
    obs = write_csv(tmp_path / "obs.csv", days=30)
    assert run(["fit", str(obs), "--json", "--infer", "auto"]) == 0
    out = json.loads(capsys.readouterr().out)
    p1 = next(c for c in out["constituents"] if c["name"] == "P1")
    assert p1["inferred_from"] == "K1"


def test_without_inference_a_short_record_gets_a_note(tmp_path, capsys):
    obs = write_csv(tmp_path / "obs.csv", days=30)
    assert run(["fit", str(obs), "--json", "--infer", "none"]) == 0
    out, err = capsys.readouterr()
    assert "P1" in err and "equilibrium" in err
    assert not any("inferred_from" in c for c in json.loads(out)["constituents"])


def test_fit_infers_by_default_like_refit_and_the_daemon(tmp_path, capsys):
    # One default everywhere: a 30-day record cannot resolve P1 from K1 or K2 from S2 (182.6
    # days, Rayleigh criterion; Godin 1972), so they are inferred unless '--infer none'.
    obs = write_csv(tmp_path / "obs.csv", days=30)
    assert run(["fit", str(obs), "--json"]) == 0
    out = json.loads(capsys.readouterr().out)
    got = {c["name"]: c.get("inferred_from") for c in out["constituents"]}
    assert got["P1"] == "K1" and got["K2"] == "S2"
    assert {d["name"]: d["from"] for d in out["inferred"]}.items() >= {"P1": "K1", "K2": "S2"}.items()


def test_fit_table_says_what_was_inferred_from_what(tmp_path, capsys):
    obs = write_csv(tmp_path / "obs.csv", days=20)
    assert run(["fit", str(obs)]) == 0
    text = capsys.readouterr().out
    assert "Inferred, not fitted" in text
    for line in ("P1 = K1", "K2 = S2", "N2 = M2", "Q1 = O1"):
        assert line in text


def test_fit_says_whether_it_was_robust_and_why(tmp_path, capsys):
    obs = write_csv(tmp_path / "obs.csv", days=30)
    assert run(["fit", str(obs)]) == 0
    text = capsys.readouterr().out
    assert "least squares: residual close to Gaussian" in text
    assert run(["fit", str(obs), "--robust"]) == 0
    assert "robust least squares (IRLS, Cauchy weights): asked for" in capsys.readouterr().out
    assert run(["fit", str(obs), "--json", "--robust", "off"]) == 0
    assert json.loads(capsys.readouterr().out)["robust_reason"] == "not asked for"


def test_a_local_time_the_clock_change_repeats_is_refused_naming_its_line(tmp_path):
    # Europe/Dublin set its clocks back from 02:00 IST to 01:00 GMT on 2024-10-27 (EU rule,
    # last Sunday of October, from memory; as in the IANA tz database): 01:30 happened twice.
    p = tmp_path / "obs.csv"
    p.write_text("time,level\n2024-10-27T00:30,1.0\n2024-10-27T01:30,1.1\n")
    with pytest.raises(FeedError, match=r"obs\.csv line 3: local time '2024-10-27T01:30' is ambiguous"):
        read_level_csv(p, tz="Europe/Dublin")


def test_an_unknown_zone_is_refused_by_the_reader(tmp_path):
    p = tmp_path / "obs.csv"
    p.write_text("time,level\n2024-10-27T00:30,1.0\n")
    with pytest.raises(FeedError, match="unknown time zone"):
        read_level_csv(p, tz="Mars/Olympus")


# ----------------------------------------------------------------- plausible units

def _scaled(path, factor, offset=0.0):
    """The invented port's CSV with every level multiplied (metres -> another unit)."""
    lines = path.read_text().splitlines()
    out = [lines[0]] + [f"{t},{(float(v) + offset) * factor:.2f}" for t, v in (ln.split(",") for ln in lines[1:])]
    path.write_text("\n".join(out) + "\n")
    return path


def test_levels_in_centimetres_are_refused_naming_the_unit(tmp_path, capsys):
    obs = _scaled(write_csv(tmp_path / "obs.csv", days=30), 100.0)   # about 0.4 to 4.5 m -> 40 to 450
    assert run(["fit", str(obs)]) == 2
    err = capsys.readouterr().err
    assert "obs.csv" in err and "look like centimetres" in err and "Traceback" not in err


def test_levels_in_millimetres_are_refused_naming_the_unit(tmp_path, capsys):
    obs = _scaled(write_csv(tmp_path / "obs.csv", days=30), 1000.0)
    assert run(["fit", str(obs), "--json"]) == 2
    assert "look like millimetres" in capsys.readouterr().err


def test_small_range_in_centimetres_is_caught_by_its_mean(tmp_path, capsys):
    # a microtidal port in centimetres: range small enough to pass as metres, mean not
    obs = _scaled(write_csv(tmp_path / "obs.csv", days=30), 5.0, offset=30.0)  # mean about 160, range about 20
    assert run(["fit", str(obs)]) == 2
    assert "look like centimetres" in capsys.readouterr().err


def test_a_big_tide_in_metres_passes(tmp_path, capsys):
    # a macrotidal range (3 x the invented port, about 9 m spring range) stays a tide in metres
    obs = _scaled(write_csv(tmp_path / "obs.csv", days=30), 3.0)
    assert run(["fit", str(obs), "--json"]) == 0
