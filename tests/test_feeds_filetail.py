"""Following a growing file: rotation, truncation, partial lines, restarts, arbitrary bytes.

The expected behaviour is that of following a log by name with retry, as the POSIX-era
``tail`` utilities do (GNU coreutils manual, "tail invocation", options --follow=name and
--retry; from memory), and the "replace" error handler of Python's codecs (Python library
reference, codecs, "Error Handlers": undecodable bytes become U+FFFD).
"""
from __future__ import annotations

import json
import os

from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from monitor.feeds import RawLine, feed_from_config, open_feed
from monitor.feeds.filetail import FIRST_READ_BYTES, FileFeed


def append(path, data: bytes) -> None:
    with open(path, "ab") as f:
        f.write(data)


def texts(lines: list[RawLine]) -> list[str]:
    return [line.text for line in lines]


def restart(feed: FileFeed) -> FileFeed:
    """What the daemon does across a restart: checkpoint through JSON, new feed, restore."""
    state = json.loads(json.dumps(feed.state()))
    feed.close()
    again = FileFeed(feed.name, feed.path)
    again.restore(state)
    return again


def test_lines_arrive_with_numbers_source_and_receive_time(tmp_path):
    path = tmp_path / "gauge.csv"
    append(path, b"time,level\n2031-03-01T00:00Z,1.250\n")
    feed = FileFeed("quay", str(path))
    lines = feed.poll()
    assert texts(lines) == ["time,level", "2031-03-01T00:00Z,1.250"]
    assert [line.lineno for line in lines] == [1, 2]
    assert all(line.source == str(path) and line.received > 0 for line in lines)


def test_nothing_new_returns_empty(tmp_path):
    path = tmp_path / "gauge.csv"
    append(path, b"a\n")
    feed = FileFeed("quay", str(path))
    feed.poll()
    assert feed.poll() == []


def test_file_that_does_not_exist_yet_is_waited_for(tmp_path):
    path = tmp_path / "later.csv"
    feed = FileFeed("quay", str(path))
    assert feed.poll() == []
    assert feed.last_error and "later.csv" in feed.last_error
    append(path, b"first\n")
    assert texts(feed.poll()) == ["first"]
    assert feed.last_error is None


def test_partial_last_line_waits_until_completed(tmp_path):
    path = tmp_path / "gauge.csv"
    append(path, b"one\ntw")
    feed = FileFeed("quay", str(path))
    assert texts(feed.poll()) == ["one"]
    assert feed.poll() == []
    append(path, b"o\n")
    assert texts(feed.poll()) == ["two"]


def test_crlf_line_ends_are_stripped(tmp_path):
    # CR LF line ends, as written by many data loggers (common practice, no source).
    path = tmp_path / "gauge.csv"
    append(path, b"one\r\ntwo\r\n")
    assert texts(FileFeed("quay", str(path)).poll()) == ["one", "two"]


def test_utf8_byte_order_mark_dropped_from_first_line(tmp_path):
    # The UTF-8 encoding of U+FEFF is EF BB BF (Unicode Standard, ch. 23.8; from memory).
    path = tmp_path / "gauge.csv"
    append(path, b"\xef\xbb\xbftime,level\n")
    assert texts(FileFeed("quay", str(path)).poll()) == ["time,level"]


def test_invalid_utf8_is_replaced_not_raised(tmp_path):
    # Python codecs "replace" handler: each undecodable byte -> U+FFFD (library reference).
    path = tmp_path / "gauge.csv"
    append(path, b"ok\n\xff\xfe1.2\n")
    assert texts(FileFeed("quay", str(path)).poll()) == ["ok", "\ufffd\ufffd1.2"]


def test_rotation_finishes_old_file_then_follows_new(tmp_path):
    path = tmp_path / "gauge.csv"
    append(path, b"a1\n")
    feed = FileFeed("quay", str(path))
    assert texts(feed.poll()) == ["a1"]
    append(path, b"a2\n")                       # written just before the rename
    os.rename(path, tmp_path / "gauge.csv.1")
    append(path, b"b1\nb2\n")
    got = texts(feed.poll()) + texts(feed.poll()) + texts(feed.poll())
    assert got == ["a2", "b1", "b2"]


def test_rotation_takes_unterminated_end_of_old_file_as_a_line(tmp_path):
    path = tmp_path / "gauge.csv"
    append(path, b"a1\na2-no-newline")
    feed = FileFeed("quay", str(path))
    feed.poll()
    os.rename(path, tmp_path / "gauge.csv.1")
    append(path, b"b1\n")
    assert texts(feed.poll() + feed.poll()) == ["a2-no-newline", "b1"]


def test_new_file_line_numbers_start_again(tmp_path):
    path = tmp_path / "gauge.csv"
    append(path, b"a1\na2\n")
    feed = FileFeed("quay", str(path))
    feed.poll()
    os.rename(path, tmp_path / "old.csv")
    append(path, b"b1\n")
    assert [line.lineno for line in feed.poll() + feed.poll()] == [1]


def test_truncation_starts_again_at_zero(tmp_path):
    path = tmp_path / "gauge.csv"
    append(path, b"a-long-first-line\nanother\n")
    feed = FileFeed("quay", str(path))
    feed.poll()
    with open(path, "wb") as f:                 # copy-and-truncate rotation
        f.write(b"c1\n")
    lines = feed.poll()
    assert texts(lines) == ["c1"] and lines[0].lineno == 1


def test_rewrite_with_new_content_longer_than_before_is_read_from_start(tmp_path):
    path = tmp_path / "gauge.csv"
    append(path, b"2031-03-01T00:00Z,1.0\n")
    feed = FileFeed("quay", str(path))
    feed.poll()
    with open(path, "wb") as f:                 # replaced in place before the next poll
        f.write(b"2031-03-02T00:00Z,2.0\n2031-03-02T00:01Z,2.1\n")
    assert texts(feed.poll()) == ["2031-03-02T00:00Z,2.0", "2031-03-02T00:01Z,2.1"]


def test_restart_neither_repeats_nor_loses_lines(tmp_path):
    path = tmp_path / "gauge.csv"
    append(path, b"1\n2\n3")
    feed = FileFeed("quay", str(path))
    assert texts(feed.poll()) == ["1", "2"]
    feed = restart(feed)
    append(path, b"\n4\n")
    lines = feed.poll()
    assert texts(lines) == ["3", "4"]
    assert [line.lineno for line in lines] == [3, 4]


def test_restart_after_rotation_finishes_renamed_file_first(tmp_path):
    path = tmp_path / "gauge.csv"
    append(path, b"a1\n")
    feed = FileFeed("quay", str(path))
    feed.poll()
    state = json.loads(json.dumps(feed.state()))
    feed.close()
    append(path, b"a2\n")                       # while the daemon was down: more, then rotation
    os.rename(path, tmp_path / "gauge-old.csv")
    append(path, b"b1\n")
    feed = FileFeed("quay", str(path))
    feed.restore(state)
    assert texts(feed.poll() + feed.poll()) == ["a2", "b1"]


def test_restart_onto_a_different_file_reads_it_from_start(tmp_path):
    path = tmp_path / "gauge.csv"
    append(path, b"a1\na2\n")
    feed = FileFeed("quay", str(path))
    feed.poll()
    state = feed.state()
    feed.close()
    os.remove(path)
    append(path, b"new1\n")
    feed = FileFeed("quay", str(path))
    feed.restore(state)
    assert texts(feed.poll()) == ["new1"]


def test_restore_with_garbage_state_starts_from_beginning(tmp_path):
    path = tmp_path / "gauge.csv"
    append(path, b"x\n")
    feed = FileFeed("quay", str(path))
    feed.restore({"dev": 1, "ino": 2, "offset": "many"})
    assert texts(feed.poll()) == ["x"]


def test_state_is_json_and_names_offset_of_complete_lines(tmp_path):
    path = tmp_path / "gauge.csv"
    append(path, b"ab\ncd")
    feed = FileFeed("quay", str(path))
    feed.poll()
    state = json.loads(json.dumps(feed.state()))
    assert (state["offset"], state["lineno"]) == (3, 1)


def test_open_feed_from_config_follows_file(tmp_path):
    path = tmp_path / "gauge.csv"
    append(path, b"z\n")
    spec, errors = feed_from_config({"kind": "file", "path": "gauge.csv"}, "feeds.quay",
                                    base_dir=tmp_path)
    assert errors == []
    with open_feed(spec, "quay") as feed:
        assert texts(feed.poll()) == ["z"] and feed.exhausted is False


def test_small_chunks_read_over_several_polls(tmp_path):
    path = tmp_path / "gauge.csv"
    append(path, b"".join(b"%d\n" % i for i in range(100)))
    feed = FileFeed("quay", str(path), chunk=16)
    got = []
    for _ in range(100):
        got += texts(feed.poll())
    assert got == [str(i) for i in range(100)]


def test_a_backlog_is_read_in_polls_that_start_small_and_grow(tmp_path):
    path = tmp_path / "gauge.csv"
    lines = [f"2025-01-01T00:00:00Z,{i:08d}" for i in range(20_000)]  # 30 bytes each, 600 kB
    append(path, "".join(x + "\n" for x in lines).encode())
    feed = FileFeed("quay", str(path), chunk=256 << 10)
    sizes, got = [], []
    while len(got) < len(lines):
        polled = texts(feed.poll())
        assert polled, "a poll returned nothing with lines left"
        sizes.append(len(polled))
        got += polled
    assert got == lines
    assert sizes[0] * 30 <= FIRST_READ_BYTES and sizes[0] > 0.9 * FIRST_READ_BYTES / 30
    assert sizes[1] > 1.9 * sizes[0] and sizes[2] > 1.9 * sizes[1]  # doubling ...
    assert max(sizes) * 30 <= 256 << 10  # ... up to the chunk


def test_after_the_backlog_the_next_burst_starts_small_again(tmp_path):
    path = tmp_path / "gauge.csv"
    append(path, b"".join(b"%029d\n" % i for i in range(10_000)))
    feed = FileFeed("quay", str(path), chunk=1 << 20)
    while feed.poll():
        pass
    append(path, b"".join(b"%029d\n" % i for i in range(10_000)))
    assert len(feed.poll()) * 30 <= FIRST_READ_BYTES


def expected_lines(data: bytes) -> list[str]:
    """Reference: the complete lines in ``data`` decoded as documented."""
    parts = data.split(b"\n")[:-1]
    return [
        (p[:-1] if p.endswith(b"\r") else p)
        .removeprefix(b"\xef\xbb\xbf" if i == 0 else b"")
        .decode("utf-8", errors="replace")
        for i, p in enumerate(parts)
    ]


@settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(
    chunks=st.lists(st.binary(max_size=40) | st.sampled_from([b"\n", b"\r\n", b"\xff\n", b"a"]),
                    max_size=25),
    restarts=st.lists(st.booleans(), max_size=25),
    chunk=st.sampled_from([7, 64, 1 << 20]),
)
def test_arbitrary_bytes_in_arbitrary_chunks_give_each_complete_line_once(
        tmp_path_factory, chunks, restarts, chunk):
    path = tmp_path_factory.mktemp("prop") / "gauge.csv"
    path.touch()
    feed = FileFeed("quay", str(path), chunk=chunk)
    got: list[RawLine] = []
    for i, piece in enumerate(chunks):
        append(path, piece)
        got += feed.poll()
        if i < len(restarts) and restarts[i]:
            state = json.loads(json.dumps(feed.state()))
            feed.close()
            feed = FileFeed("quay", str(path), chunk=chunk)
            feed.restore(state)
    for _ in range(sum(len(c) for c in chunks) // chunk + 2):
        got += feed.poll()
    feed.close()
    written = b"".join(chunks)
    assert texts(got) == expected_lines(written)
    assert [line.lineno for line in got] == list(range(1, len(got) + 1))


operations = st.lists(
    st.tuples(st.just("append"), st.binary(max_size=30) | st.sampled_from([b"\n", b"x\ny"]))
    | st.just(("rotate", b"")) | st.just(("restart", b"")),
    max_size=30,
)


@settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(ops=operations)
def test_appends_rotations_and_restarts_lose_and_repeat_nothing(tmp_path_factory, ops):
    folder = tmp_path_factory.mktemp("rot")
    path = folder / "gauge.csv"
    generations = [b""]                         # content of each file that held the name
    created = [False]                           # whether that file was ever created
    feed = FileFeed("quay", str(path))
    got: list[RawLine] = []
    for op, data in ops:
        if op == "append":
            append(path, data)
            generations[-1] += data
            created[-1] = True
        elif op == "rotate" and path.exists():
            os.rename(path, folder / f"gauge.csv.{len(generations)}")
            generations.append(b"")
            created.append(False)
        elif op == "restart":
            feed = restart(feed)
        # two polls per step: a rotated file is finished once it is seen to be quiet
        got += feed.poll() + feed.poll()
    got += feed.poll() + feed.poll()
    feed.close()
    expected = []
    for i, content in enumerate(generations):
        # an unterminated end is taken as a line once a new file has taken the name
        finished = any(created[i + 1:]) and content and not content.endswith(b"\n")
        expected += expected_lines(content + (b"\n" if finished else b""))
    assert texts(got) == expected
