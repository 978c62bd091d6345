"""Bad input on the command line: one line naming the file, line, option or key, exit 2,
no traceback, and nothing already stored is lost.

Facts used: the UTC offsets of Europe/Dublin around its 2025 clock changes (01:00 local on
30 March is skipped, 01:00-02:00 local on 26 October happens twice) are from the IANA time
zone database shipped with Python (zoneinfo), a general-purpose reference.
"""
from __future__ import annotations

import datetime as dt
import sqlite3
import textwrap

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from monitor.cli import main
from monitor.cli.common import store_errors
from monitor.cli.errors import UserError
from monitor.cli.timeparse import local_text, parse_date, parse_time
from predictor.timeutil import parse_duration
from units import minute, hour, day


CONSTANTS = textwrap.dedent("""\
    mean = 2.0
    [[constituents]]
    name = "M2"
    amplitude = 1.0
    phase = 40.0
    [[constituents]]
    name = "K1"
    amplitude = 0.2
    phase = 100.0
""")


@pytest.fixture(scope="module")
def port(tmp_path_factory):
    """An invented station with a store holding 48 hourly rows."""
    d = tmp_path_factory.mktemp("port")
    (d / "constants.toml").write_text(CONSTANTS)
    (d / "config.toml").write_text(textwrap.dedent("""\
        [store]
        path = "q.db"
        [[stations]]
        id = "harbour"
        name = "Invented Harbour"
        latitude = 50.0
        longitude = -5.0
        tz = "Europe/Dublin"
        constants = "constants.toml"
        datums = { chart = 1.0 }
        [stations.sensors.primary]
        units = "m"
        line = { delimiter = ",", time_column = 1, value_column = 2, header_lines = 1 }
        feed = { kind = "file", path = "incoming.csv" }
        """))
    rows = "".join(f"2025-01-{1 + h // 24:02d}T{h % 24:02d}:00:00Z,{2 + (h % 5) / 10:.2f}\n" for h in range(48))
    (d / "good.csv").write_text("time,level\n" + rows)
    (d / "folder").mkdir()
    (d / "empty.csv").write_bytes(b"")
    (d / "binary.csv").write_bytes(bytes(range(256)) * 4)
    code = main(["ingest", str(d / "config.toml"), "--station", "harbour", str(d / "good.csv")])
    assert code == 0
    return d


def stored(port) -> int:
    with sqlite3.connect(port / "q.db") as c:
        return c.execute("SELECT count(*) FROM observations").fetchone()[0]


def run(capsys, *argv) -> tuple[int, str]:
    try:
        code = main([str(a) for a in argv])
    except SystemExit as exc:  # argparse refusing an option value
        code = exc.code
    err = capsys.readouterr().err
    assert "Traceback" not in err
    return code, err


def user_error(capsys, *argv) -> str:
    """Run a verb that must fail with one line; return that line."""
    code, err = run(capsys, *argv)
    assert code == 2
    lines = [ln for ln in err.splitlines() if ln.strip()]
    assert len(lines) == 1, err
    assert lines[0].startswith(f"quaywatch {argv[0]}: ")
    return lines[0]


# --------------------------------------------------------------------------- files


@pytest.mark.parametrize("name,expected", [
    ("missing.csv", "no such file"),
    ("folder", "folder"),
    ("empty.csv", "empty"),
    ("binary.csv", "not UTF-8"),
])
def test_fit_refuses_unusable_files(capsys, port, name, expected):
    line = user_error(capsys, "fit", port / name)
    assert name in line and expected in line


def test_fit_names_the_line_of_a_non_numeric_level(capsys, tmp_path):
    f = tmp_path / "obs.csv"
    f.write_text("time,level\n2030-01-01T00:00Z,1.0\n2030-01-01T01:00Z,high\n")
    line = user_error(capsys, "fit", f)
    assert "obs.csv line 3" in line and "'high'" in line


def test_fit_names_the_wrong_header(capsys, tmp_path):
    f = tmp_path / "obs.csv"
    f.write_text("when,height\n2030-01-01T00:00Z,1.0\n")
    assert "line 1" in user_error(capsys, "fit", f)


def test_fit_refuses_naive_times_without_tz(capsys, tmp_path):
    f = tmp_path / "obs.csv"
    f.write_text("time,level\n2030-01-01T00:00,1.0\n")
    line = user_error(capsys, "fit", f)
    assert "line 2" in line and "--tz" in line


def test_fit_reads_a_bom_and_crlf_file(capsys, tmp_path):
    # three days of an invented hourly record, written the way a spreadsheet saves it
    rows = "".join(f"2030-01-{1 + h // 24:02d}T{h % 24:02d}:00:00Z,{2 + 0.01 * (h % 12)}\r\n" for h in range(72))
    f = tmp_path / "obs.csv"
    f.write_bytes(b"\xef\xbb\xbf" + ("time,level\r\n" + rows).encode())
    code, _ = run(capsys, "fit", f, "--json")
    assert code == 0


@pytest.mark.parametrize("name,expected", [
    ("missing.csv", "no such"),
    ("folder", "is a folder"),
    ("empty.csv", "empty file"),
    ("binary.csv", "binary data"),
])
def test_ingest_refuses_unusable_files_and_keeps_the_store(capsys, port, name, expected):
    before = stored(port)
    line = user_error(capsys, "ingest", port / "config.toml", "--station", "harbour", port / name)
    assert name in line and expected in line
    assert stored(port) == before


def test_ingest_of_a_file_with_no_usable_line_is_an_error_and_keeps_the_store(capsys, port, tmp_path):
    f = tmp_path / "wrong.csv"
    f.write_text("time,level\nyesterday,high\nlater,low\n")
    before = stored(port)
    line = user_error(capsys, "ingest", port / "config.toml", "--station", "harbour", f)
    assert "wrong.csv" in line and "line 2" in line and "sensors.primary.line" in line
    assert stored(port) == before


def test_ingest_strips_a_byte_order_mark(capsys, port, tmp_path):
    f = tmp_path / "bom.csv"
    f.write_bytes(b"\xef\xbb\xbftime,level\r\n2025-02-01T00:00:00Z,1.5\r\n")
    before = stored(port)
    code, _ = run(capsys, "ingest", port / "config.toml", "--station", "harbour", f)
    assert code == 0 and stored(port) == before + 1


@pytest.mark.parametrize("verb", ["predict", "table", "datums"])
@pytest.mark.parametrize("name,expected", [("missing.toml", "no such"), ("folder", "is a folder")])
def test_tide_verbs_refuse_unusable_constants_files(capsys, port, verb, name, expected):
    extra = ["--start", "2030-01-01T00:00Z", "--end", "2030-01-02T00:00Z"] if verb == "predict" else []
    line = user_error(capsys, verb, port / name, *extra)
    assert name in line and expected in line


# --------------------------------------------------------------------------- configuration


@pytest.mark.parametrize("text,key", [
    ("[store]\npath = 5\n", "store.path"),
    ("[[stations]]\nid = 7\n", "stations[0].id"),
    ("not toml [[[\n", "line 1"),
])
def test_check_names_the_key_of_a_bad_configuration(capsys, tmp_path, text, key):
    f = tmp_path / "config.toml"
    f.write_text(text)
    code, err = run(capsys, "check", f)
    assert code == 2
    assert err.splitlines()[0].startswith(f"quaywatch check: {f}")
    assert key in err


@pytest.mark.parametrize("argv", [
    ["status", "{cfg}", "--station", "nowhere"],
    ["export", "{cfg}", "--station", "nowhere", "--from", "2030-01-01", "--to", "2030-01-02"],
    ["qc", "{cfg}", "--station", "nowhere", "--from", "2030-01-01", "--to", "2030-01-02"],
    ["refit", "{cfg}", "--station", "nowhere"],
    ["alerts", "{cfg}", "episodes", "--station", "nowhere"],
])
def test_an_unknown_station_is_named(capsys, port, argv):
    line = user_error(capsys, *[a.format(cfg=port / "config.toml") for a in argv])
    assert "'nowhere'" in line and "harbour" in line


# --------------------------------------------------------------------------- times and ranges


@pytest.mark.parametrize("text", ["01/02/2030", "now", "2030-13-01", "1000-01-01T00:00Z", "2030-01-01 junk"])
def test_export_refuses_a_date_that_is_not_iso_or_out_of_range(capsys, port, text):
    line = user_error(capsys, "export", port / "config.toml", "--station", "harbour",
                      "--from", text, "--to", "2030-01-02")
    assert f"--from {text!r}" in line


@pytest.mark.parametrize("verb,extra", [
    ("export", []),
    ("qc", []),
])
def test_from_after_to_is_refused(capsys, port, verb, extra):
    line = user_error(capsys, verb, port / "config.toml", "--station", "harbour",
                      "--from", "2030-01-02", "--to", "2030-01-01", *extra)
    assert "--from 2030-01-02 is after --to 2030-01-01" in line


def test_predict_start_after_end_is_refused(capsys, port):
    line = user_error(capsys, "predict", port / "constants.toml", "--start", "2030-01-02T00:00Z",
                      "--end", "2030-01-01T00:00Z")
    assert "--start" in line and "--end" in line


def test_predict_refuses_more_rows_than_it_can_write(capsys, port):
    line = user_error(capsys, "predict", port / "constants.toml", "--start", "1800-01-01T00:00Z",
                      "--end", "2199-01-01T00:00Z", "--step", "1s")
    assert "rows" in line


def test_flag_range_end_before_start_is_refused(capsys, port):
    line = user_error(capsys, "flag", port / "config.toml", "--station", "harbour", "--sensor", "primary",
                      "--at", "2030-01-02T00:00Z", "--to", "2030-01-01T00:00Z", "--set", "4",
                      "--who", "tech", "--why", "test")
    assert "--at" in line and "--to" in line


def test_table_start_must_be_a_date(capsys, port):
    line = user_error(capsys, "table", port / "constants.toml", "--start", "2030/01/01")
    assert "--start '2030/01/01'" in line and "YYYY-MM-DD" in line


# --------------------------------------------------------------------------- outputs and options


@pytest.mark.parametrize("target", ["folder", "no-such-folder/out.csv"])
def test_export_to_an_unwritable_path_is_refused(capsys, port, target):
    line = user_error(capsys, "export", port / "config.toml", "--station", "harbour",
                      "--from", "2030-01-01", "--to", "2030-01-02", "-o", port / target)
    assert "-o" in line and "cannot write" in line


def test_fit_to_an_unwritable_path_is_refused(capsys, port):
    line = user_error(capsys, "fit", port / "good.csv", "-o", port / "folder")
    assert "-o" in line and "cannot write" in line


@pytest.mark.parametrize("argv", [
    ["refit", "{cfg}", "--station", "harbour", "--days", "nan"],
    ["qc", "{cfg}", "--station", "harbour", "--from", "2030-01-01", "--to", "2030-01-02", "--episodes", "-1"],
    ["alerts", "{cfg}", "episodes", "--limit", "0"],
    ["staff", "add", "{cfg}", "--station", "harbour", "--at", "2030-01-01T00:00Z", "--reading", "inf",
     "--who", "tech"],
])
def test_out_of_range_option_values_are_refused(capsys, port, argv):
    code, err = run(capsys, *[a.format(cfg=port / "config.toml") for a in argv])
    assert code == 2 and "argument" in err.splitlines()[-1]


# --------------------------------------------------------------------------- a busy store


def test_a_store_locked_by_another_writer_gives_one_line(tmp_path):
    db = tmp_path / "q.db"
    holder = sqlite3.connect(db, isolation_level=None)
    holder.execute("CREATE TABLE t (x)")
    holder.execute("BEGIN IMMEDIATE")

    @store_errors
    def verb(args):
        other = sqlite3.connect(db, timeout=0.05)
        other.execute("INSERT INTO t VALUES (1)")

    class Args:
        config = "config.toml"

    with pytest.raises(UserError, match=r"^config.toml: the store is busy"):
        verb(Args())
    holder.execute("ROLLBACK")


# --------------------------------------------------------------------------- property tests


@settings(max_examples=40, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(data=st.binary(max_size=400))
def test_fit_of_arbitrary_bytes_never_shows_a_traceback(capsys, tmp_path, data):
    f = tmp_path / "any.csv"
    f.write_bytes(data)
    code, _ = run(capsys, "fit", f)
    assert code in (0, 2)


@settings(max_examples=40, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(data=st.binary(max_size=400))
def test_ingest_of_arbitrary_bytes_never_shows_a_traceback_or_loses_rows(capsys, port, tmp_path, data):
    f = tmp_path / "any.csv"
    f.write_bytes(data)
    before = stored(port)
    code, _ = run(capsys, "ingest", port / "config.toml", "--station", "harbour", f)
    assert code in (0, 2)
    assert stored(port) >= before


@settings(max_examples=200, deadline=None)
@given(st.text(max_size=30))
def test_parse_time_gives_a_timestamp_or_a_user_error(text):
    try:
        ts = parse_time(text, "--at", "Europe/Dublin")
    except UserError as exc:
        assert str(exc).startswith("--at ")
    else:
        assert str(ts.tz) == "UTC"


# --------------------------------------------------------------------------- the shared parsers


def test_parse_time_takes_a_naive_time_in_the_given_zone():
    # Europe/Dublin keeps Irish Standard Time, UTC+1, in summer (IANA tz database)
    assert parse_time("2030-07-01T12:00", "--at", "Europe/Dublin") == parse_time("2030-07-01T11:00Z", "--at")


def test_parse_time_refuses_a_skipped_local_time():
    # clocks go from 01:00 to 02:00 local on 2025-03-30 in Europe/Dublin (IANA tz database)
    with pytest.raises(UserError, match="does not exist in Europe/Dublin"):
        parse_time("2025-03-30T01:30", "--from", "Europe/Dublin")


def test_parse_time_refuses_a_repeated_local_time_and_offers_both_offsets():
    # 01:00-02:00 local happens twice on 2025-10-26 in Europe/Dublin (IANA tz database)
    with pytest.raises(UserError, match=r"\+01:00 or \+00:00"):
        parse_time("2025-10-26T01:30", "--from", "Europe/Dublin")


def test_parse_time_reads_a_date_with_a_zone_as_midnight():
    assert parse_time("2030-01-01Z", "--at") == parse_time("2030-01-01T00:00:00Z", "--at")


def test_parse_date_refuses_a_day_first_date():
    with pytest.raises(UserError, match="YYYY-MM-DD"):
        parse_date("01-02-2030", "--date")


def test_local_text_names_the_zone_and_utc():
    # 2030-07-01T11:00Z is 12:00 IST in Dublin (IANA tz database)
    t = dt.datetime(2030, 7, 1, 11, 0, tzinfo=dt.timezone.utc).timestamp()
    assert local_text(t, "Europe/Dublin", utc=True) == "2030-07-01 12:00 IST (11:00Z)"


@pytest.mark.parametrize("text,seconds", [
    ("90s", 90), ("10min", 10 * minute), ("10m", 10 * minute), ("2h", 2 * hour), ("1d", day),
    ("1h30min", 90 * minute), ("1.5 h", 90 * minute), ("600", 600), ("0:10", 10 * minute), (45, 45),
])
def test_parse_duration_reads_what_people_write(text, seconds):
    assert parse_duration(text) == seconds


@pytest.mark.parametrize("text", ["", "-5min", "10 parsecs", "h", "nan", "1e3s", True, None, float("inf")])
def test_parse_duration_refuses_the_rest(text):
    with pytest.raises(ValueError):
        parse_duration(text)


def test_parse_duration_positive_refuses_zero():
    with pytest.raises(ValueError, match="above zero"):
        parse_duration("0s", positive=True)
