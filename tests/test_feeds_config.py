"""Validation of a feed table: accepted settings, and one clear message per problem.

Serial framing values are the ones RS-232 style UARTs offer (5-8 data bits; parity none, even,
odd, mark, space; 1, 1.5 or 2 stop bits: pyserial API documentation, "Constants"); the
encoding check relies on Python's codecs registry (library reference, "Standard Encodings").
"""
from __future__ import annotations

from hypothesis import given, settings
from hypothesis import strategies as st

from monitor.feeds import FeedSpec, feed_from_config
from monitor.feeds.spec import ALL_KEYS


def check(raw, **kw):
    return feed_from_config(raw, "feeds.quay", **kw)


def test_file_minimal_with_defaults():
    spec, errors = check({"kind": "file", "path": "/data/gauge.csv"})
    assert errors == []
    assert spec == FeedSpec(kind="file", path="/data/gauge.csv")


def test_relative_path_taken_from_base_dir(tmp_path):
    spec, _ = check({"kind": "file", "path": "in/gauge.csv"}, base_dir=tmp_path)
    assert spec.path == str(tmp_path / "in" / "gauge.csv")


def test_serial_full_framing():
    spec, errors = check({"kind": "serial", "port": "/dev/ttyUSB0", "baud": 19200,
                          "bytesize": 7, "parity": "odd", "stopbits": 1.5, "flow": "rtscts",
                          "reopen_after": 0.5, "reopen_max": 30})
    assert errors == []
    assert (spec.baud, spec.bytesize, spec.parity, spec.stopbits, spec.flow) == (
        19200, 7, "odd", 1.5, "rtscts")


def test_replay_by_rate_needs_no_time_column():
    assert check({"kind": "replay", "path": "r.csv", "rate": 10})[1] == []


def test_missing_kind_is_reported_at_table():
    assert check({"path": "x"})[1][0].startswith("feeds.quay: missing key 'kind'")


def test_unknown_kind_lists_the_kinds():
    (message,) = check({"kind": "ftp", "path": "x"})[1]
    assert message.startswith("feeds.quay.kind:") and '"serial"' not in message \
        and "'serial'" in message


def test_unknown_key_is_an_error_naming_it():
    (message,) = check({"kind": "file", "path": "x", "colour": "red"})[1]
    assert message.startswith("feeds.quay.colour: unknown key")


def test_key_of_another_kind_says_which_kinds_use_it():
    (message,) = check({"kind": "file", "path": "x", "baud": 9600})[1]
    assert message == "feeds.quay.baud: not used by kind = 'file' (only by serial)"


def test_ignored_keys_belong_to_someone_else():
    assert check({"kind": "file", "path": "x", "columns": ["time", "level"]},
                 ignore={"columns"})[1] == []


def test_missing_required_path():
    assert check({"kind": "folder"})[1] == [
        "feeds.quay: missing key 'path', needed for kind = 'folder'"]


def test_bool_is_not_a_baud_rate():
    # TOML booleans are not integers (TOML v1.0.0 spec), though Python's bool is an int
    assert check({"kind": "serial", "port": "p", "baud": True})[1][0].startswith(
        "feeds.quay.baud:")


def test_bad_framing_values_each_reported():
    errors = check({"kind": "serial", "port": "p", "bytesize": 9, "parity": "E",
                    "stopbits": 3, "flow": "hardware"})[1]
    assert [e.split(":")[0] for e in errors] == [
        "feeds.quay.bytesize", "feeds.quay.parity", "feeds.quay.flow", "feeds.quay.stopbits"]


def test_reopen_max_below_reopen_after():
    assert check({"kind": "serial", "port": "p", "reopen_after": 10, "reopen_max": 5})[1] == [
        "feeds.quay.reopen_max: must not be less than reopen_after"]


def test_replay_paced_needs_time_column():
    (message,) = check({"kind": "replay", "path": "r.csv", "speedup": 60})[1]
    assert message.startswith("feeds.quay.time_column: needed")


def test_replay_rate_and_speedup_together_refused():
    (message,) = check({"kind": "replay", "path": "r", "rate": 2, "speedup": 3})[1]
    assert message.startswith("feeds.quay.rate:")


def test_negative_speedup_refused():
    assert check({"kind": "replay", "path": "r", "speedup": -1})[1][0].startswith(
        "feeds.quay.speedup: expected")


def test_time_column_zero_refused_counting_from_one():
    assert "counting from 1" in check(
        {"kind": "replay", "path": "r", "speedup": 1, "time_column": 0})[1][0]


def test_time_format_must_be_known_or_a_pattern():
    assert check({"kind": "replay", "path": "r", "speedup": 0, "time_format": "excel"})[1][0] \
        .startswith("feeds.quay.time_format:")


def test_utf16_refused_because_line_ends_are_two_bytes():
    # UTF-16 encodes U+000A as two bytes (Unicode Standard, ch. 3.9; from memory)
    assert "single bytes" in check({"kind": "file", "path": "x", "encoding": "utf-16"})[1][0]


def test_latin1_accepted():
    assert check({"kind": "file", "path": "x", "encoding": "latin-1"})[1] == []


def test_not_a_table():
    assert check(["kind", "file"])[1] == ["feeds.quay: expected a table of feed settings, got list"]


toml_values = st.recursive(
    st.booleans() | st.integers() | st.floats()
    | st.text(max_size=12),
    lambda inner: st.lists(inner, max_size=3) | st.dictionaries(st.text(max_size=5), inner,
                                                                max_size=3),
    max_leaves=5,
)


@settings(max_examples=200, deadline=None)
@given(st.dictionaries(
    st.sampled_from(sorted(ALL_KEYS) + ["bogus"]) | st.text(max_size=8),
    toml_values | st.sampled_from(["file", "folder", "serial", "replay", "*.csv", "even"]),
    max_size=8))
def test_any_table_gives_a_spec_or_messages_never_an_exception(raw):
    spec, errors = check(raw)
    assert (spec is None) == bool(errors)
    assert all(isinstance(e, str) and e.startswith("feeds.quay") for e in errors)
