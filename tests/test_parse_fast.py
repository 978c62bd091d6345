"""The fast path of batch parsing (monitor.feeds.fastparse) gives every line the outcome
the general parser gives it on its own (monitor.feeds.parse.parse_line).

The two share no code: the fast path reads bytes with numpy digit arithmetic, the general
parser reads text with pandas and Python's float. Outcomes compared: observation (time,
value bit for bit, time source, line number), reject (line number, text, the same reason
text) or skipped.
"""
from __future__ import annotations

import datetime as dt

import numpy as np
from hypothesis import given, settings
from hypothesis import strategies as st

from monitor.feeds import fastparse
from monitor.feeds.parse import LineFormat, Observation, parse_line, parse_lines

RECV = 1_760_000_000.0  # an arbitrary receive time [s] (2025-10-09)

FORMATS = [
    LineFormat(),
    LineFormat(time_format="epoch"),
    LineFormat(time_format="epoch_ms", delimiter=";"),
    LineFormat(delimiter="whitespace", time_column=3, value_column=4),
    LineFormat(delimiter="\t", time_column=2, value_column=1, comment="//"),
    LineFormat(time_column=0, value_column=1),
    LineFormat(naive_time_zone="Europe/Dublin", missing_marker="-999", header_lines=2),
    LineFormat(scale=0.3048, offset=-1.234, missing_marker="9999.99", comment=""),
]

# -- pieces of lines: times and numbers good and bad, of the shapes the fast path reads and others

good_dates = st.datetimes(min_value=dt.datetime(1900, 1, 2), max_value=dt.datetime(2199, 12, 30))
clock_changes = st.sampled_from(["2025-03-30T01:30:00", "2025-10-26T01:30:00", "2025-03-30T00:59:59",
                                 "2025-10-26T02:00:00", "2024-10-27T01:00:00"])
bad_times = st.sampled_from([
    "2025-13-01T00:00:00Z", "2025-02-29T00:00:00Z", "2024-02-29T23:59:59Z", "2025-04-31T00:00:00Z",
    "2025-01-01T24:00:00Z", "2025-01-01T23:60:00Z", "2025-01-01T23:59:60Z", "2025-01-01t00:00:00Z",
    "2025-01-01T00:00:00z", "2025-01-01 00:00:00Z", "1899-12-31T23:59:59Z", "2200-01-01T00:00:01Z",
    "2025-01-01", "2025-01-01T00:00Z", "2025-01-01T00:00:00.5Z", "2025-01-01T00:00:00+24:00",
    "2025-01-01T00:00:00+05:60", "2025-01-01T00:00:00+0530", "0000-01-01T00:00:00Z", "2025-00-10T00:00:00Z",
    "2025-01-00T00:00:00Z", "x", "", "2025-01-01T00:00:00ZZ", "+2025-01-01T00:00:00Z", "1e9", "-1",
    "7258118400", "7258118401", "-2208988800", "-2208988801", "1735689600000", "1735689600.5",
    "1735689599.5", "1735689600,5", "nan", "inf",
])
numbers = st.one_of(
    st.decimals(min_value=-1e4, max_value=1e4, allow_nan=False, places=3).map(str),
    st.integers(-10**17, 10**17).map(str),
    st.floats(allow_nan=True, allow_infinity=True).map(repr),
    st.builds(lambda s, i, f: f"{s}{i}.{f}", st.sampled_from(["", "-", "+"]), st.sampled_from(["", "0", "12", "007"]),
              st.sampled_from(["", "5", "250", "123456789012345", "1234567890123456"])),
    st.sampled_from(["", "-", "+", ".", "-.", "1.2.3", "1e3", "1E-2", "1_0", "0x10", "NaN", "-nan", "inf",
                     "-Infinity", "-999", "9999.99", "-999.0", "١٢", " 1.5", "1.5 ", "--1", "+-1",
                     "-0", "-0.000", "00000000000000001", "2.5\r"]),
)


def iso_z(d: dt.datetime) -> str:
    return d.strftime("%Y-%m-%dT%H:%M:%S") + "Z"


def iso_offset(d: dt.datetime, hours: int, minutes: int, sign: str) -> str:
    return d.strftime("%Y-%m-%dT%H:%M:%S") + f"{sign}{hours:02d}:{minutes:02d}"


# every field of a fixed-width date and time from just inside to just outside its range
wild_iso = st.builds(
    lambda y, mo, d, h, mi, sec, tail: f"{y:04d}-{mo:02d}-{d:02d}T{h:02d}:{mi:02d}:{sec:02d}{tail}",
    st.sampled_from([1899, 1900, 1970, 2000, 2024, 2025, 2100, 2199, 2200]), st.integers(0, 13),
    st.integers(0, 32), st.integers(0, 24), st.integers(0, 60), st.integers(0, 60),
    st.sampled_from(["Z", "", "+00:00", "-12:30", "+14:00", "+23:59"]))

times = st.one_of(
    good_dates.map(iso_z),
    wild_iso, wild_iso,
    st.builds(iso_offset, good_dates, st.integers(0, 25), st.sampled_from([0, 30, 45, 59, 61]),
              st.sampled_from(["+", "-"])),
    good_dates.map(lambda d: d.strftime("%Y-%m-%dT%H:%M:%S")),
    clock_changes,
    bad_times,
    st.integers(-2_300_000_000, 7_300_000_000).map(str),          # epoch seconds
    st.integers(-2_300_000_000_000, 7_300_000_000_000).map(str),  # epoch milliseconds
    st.floats(1e9, 2e9).map(lambda x: f"{x:.1f}"),
    st.just(f"{RECV + 3600:.0f}"), st.just("2025-10-09T09:00:00Z"),  # ahead of RECV by an hour
    st.text(max_size=8),
)


@st.composite
def lines_for(draw, fmt: LineFormat) -> str:
    """A line for ``fmt``: its time and value in their columns among other fields, or a
    line of another kind (blank, comment, too few columns, white space, any text)."""
    kind = draw(st.integers(0, 9))
    delim = " " if fmt.delimiter == "whitespace" else fmt.delimiter
    if kind <= 5:
        width = max(fmt.time_column, fmt.value_column) + draw(st.integers(-1, 1))
        fields = [draw(st.sampled_from(["x", "", "7", "ok"])) for _ in range(max(width, 0))]
        if fmt.time_column and fmt.time_column <= len(fields):
            fields[fmt.time_column - 1] = draw(times)
        if fmt.value_column <= len(fields):
            fields[fmt.value_column - 1] = draw(numbers)
        line = delim.join(fields)
        if kind == 5:
            line = draw(st.sampled_from([" ", "\t", "\r", "  ", "\u00a0", "\x1c"])) + line + \
                draw(st.sampled_from(["", " ", "\r", "\t", "\u3000"]))
        return line
    if kind == 6:
        return draw(st.sampled_from(["", "   ", "#", "# a comment", "//x", "time,level", "\t"]))
    if kind == 7:
        return draw(st.text(max_size=40))
    if kind == 8:
        return draw(times)
    return f"{draw(times)}{delim}{draw(numbers)}"


@st.composite
def batches(draw):
    fmt = draw(st.sampled_from(FORMATS))
    lines = draw(st.lists(lines_for(fmt), min_size=1, max_size=30))
    if draw(st.booleans()) and lines:  # duplicates: lines repeated within the batch
        lines = lines + draw(st.lists(st.sampled_from(lines), max_size=5))
    first = draw(st.integers(-2, 3))
    linenos = list(range(first, first + len(lines)))
    per_line = draw(st.booleans())
    received = [RECV + 60.0 * i for i in range(len(lines))] if per_line else RECV
    max_ahead = draw(st.sampled_from([None, 600.0]))
    as_bytes = draw(st.integers(0, 4)) == 0
    if as_bytes:
        lines = [x.encode("utf-8", "surrogatepass") for x in lines]
        if lines and draw(st.booleans()):
            lines[draw(st.integers(0, len(lines) - 1))] = b"2025-01-01T00:00:00Z,\xff\xfe"
    return fmt, lines, linenos, received, max_ahead


def outcomes_one_by_one(fmt, lines, linenos, received, max_ahead) -> list:
    recv = received if isinstance(received, list) else [received] * len(lines)
    return [parse_line(x, fmt, r, n, max_ahead) for x, r, n in zip(lines, recv, linenos)]


def outcomes_of_batch(res, n: int, linenos: list) -> list:
    out: list = [None] * n
    for k, i in enumerate(res.index.tolist()):
        out[i] = Observation(int(res.t[k]), float(res.value[k]), str(res.time_source[k]), int(res.lineno[k]))
    where = {ln: i for i, ln in enumerate(linenos)}
    for r in res.rejects:
        out[where[r.lineno]] = r
    return out


def same(a, b) -> bool:
    if isinstance(a, Observation) and isinstance(b, Observation):
        # values bit for bit (np.float64 compare would call 0.0 and -0.0 equal)
        return (a.t, a.time_source, a.lineno) == (b.t, b.time_source, b.lineno) and \
            np.float64(a.value).tobytes() == np.float64(b.value).tobytes()
    return a == b


@settings(max_examples=1000, deadline=None)
@given(batch=batches())
def test_a_batch_gives_every_line_the_outcome_it_gets_on_its_own(batch):
    fmt, lines, linenos, received, max_ahead = batch
    res = parse_lines(lines, fmt, received, linenos, max_ahead)
    expected = outcomes_one_by_one(fmt, lines, linenos, received, max_ahead)
    got = outcomes_of_batch(res, len(lines), linenos)
    assert all(same(g, e) for g, e in zip(got, expected)), [(g, e) for g, e in zip(got, expected) if not same(g, e)]
    assert res.skipped == sum(e is None for e in expected)
    assert [r.lineno for r in res.rejects] == sorted(r.lineno for r in res.rejects)
    assert res.lineno.tolist() == sorted(res.lineno.tolist())  # observations in input order


def test_one_bad_number_does_not_change_how_the_others_are_read():
    # Python's float reads '1_0' as 10 and Unicode digits; the batch read them so only
    # while every value of the batch was a number (found by the property test above)
    lines = ["2025-01-01T00:00:00Z,1_0", "2025-01-01T00:01:00Z,abc", "2025-01-01T00:02:00Z,١٢"]
    res = parse_lines(lines, LineFormat(), RECV)
    assert res.value.tolist() == [10.0, 12.0] and [r.lineno for r in res.rejects] == [2]


# -- the fast path does read the common shapes (else the test above would pass with it idle)

def common_batch(fmt: LineFormat, n: int = 50) -> list[str]:
    start = dt.datetime(2025, 3, 1, tzinfo=dt.timezone.utc)
    out = []
    for i in range(n):
        when = start + dt.timedelta(minutes=i)
        value = f"{(-1) ** i * (1.5 + i / 1000):.3f}"
        if fmt.time_format == "epoch":
            t = str(int(when.timestamp()))
        elif fmt.time_format == "epoch_ms":
            t = str(int(when.timestamp()) * 1000)
        elif fmt.naive_time_zone:
            t = when.strftime("%Y-%m-%dT%H:%M:%S")
        else:
            t = when.strftime("%Y-%m-%dT%H:%M:%S") + ("Z" if i % 2 else "+01:00")
        delim = " " if fmt.delimiter == "whitespace" else fmt.delimiter
        fields = ["x"] * max(fmt.time_column, fmt.value_column)
        if fmt.time_column:
            fields[fmt.time_column - 1] = t
        fields[fmt.value_column - 1] = value
        out.append(delim.join(fields))
    return out


def fast_read(fmt: LineFormat, lines: list, linenos: np.ndarray) -> np.ndarray:
    got = fastparse.read_batch(lines, fmt, np.full(len(lines), RECV), linenos, 600.0)
    return got.ok


def test_the_fast_path_reads_every_line_of_the_common_shapes():
    for fmt in FORMATS:
        lines = common_batch(fmt)
        ok = fast_read(fmt, lines, np.arange(10, 10 + len(lines)))
        assert ok.all(), (fmt, [x for x, k in zip(lines, ok) if not k][:3])


def test_fast_times_and_values_against_the_standard_library():
    # reference: datetime (offsets) and float (decimal text), general-purpose, not our code
    lines = ["2025-03-01T12:34:56+05:30,-0.125", "1999-12-31T23:59:59Z,1234.5678", "2000-02-29T00:00:00-08:00,.5"]
    ok = fast_read(LineFormat(), lines, np.arange(1, 4))
    res = parse_lines(lines, LineFormat(), RECV)
    expect_t = [int(dt.datetime.fromisoformat(x.split(",")[0].replace("Z", "+00:00")).timestamp()) for x in lines]
    assert ok.all() and res.t.tolist() == expect_t
    assert res.value.tolist() == [float(x.split(",")[1]) for x in lines]


def test_header_lines_are_left_to_the_general_parser():
    fmt = LineFormat(header_lines=2)
    lines = common_batch(LineFormat(), 4)
    assert fast_read(fmt, lines, np.arange(1, 5)).tolist() == [False, False, True, True]
    res = parse_lines(lines, fmt, RECV)
    assert res.skipped == 2 and res.lineno.tolist() == [3, 4]


@settings(max_examples=300, deadline=None)
@given(digits=st.lists(st.text("0123456789", min_size=1, max_size=15), min_size=1, max_size=40),
       data=st.data())
def test_fast_decimals_are_floats_bit_for_bit(digits, data):
    # reference: Python's float (correctly rounded decimal conversion), not our code
    texts = []
    for d in digits:
        dot = data.draw(st.integers(0, len(d)))
        sign = data.draw(st.sampled_from(["", "-", "+"]))
        texts.append(f"{sign}{d[:dot]}.{d[dot:]}" if data.draw(st.booleans()) else f"{sign}{d}")
    lines = [f"2025-01-01T00:00:00Z,{x}" for x in texts]
    got = fastparse.read_batch(lines, LineFormat(), np.full(len(lines), RECV),
                               np.arange(1, len(lines) + 1), None)
    assert got.ok.all()
    # the value is reading x scale + offset (here 1 and 0, which turns -0.0 into 0.0 as in the parser)
    assert [np.float64(v).tobytes() for v in got.value] == [np.float64(float(x) * 1.0 + 0.0).tobytes() for x in texts]
