"""Serial line with a real pseudo-terminal pair standing in for the gauge's serial port.

pyserial opens the slave side of a pty like any tty (pyserial documentation, "Serial on
POSIX"); when the master side closes, reads on the slave fail with EIO (Linux pty(7) man page),
which is what an unplugged USB serial adapter looks like to the reader.
"""
from __future__ import annotations

import os
import time

import pytest
import serial

from monitor.feeds import feed_from_config, open_feed
from monitor.feeds.serialline import PARITIES, STOPBITS, SerialFeed
from units import second


pytestmark = pytest.mark.skipif(not hasattr(os, "openpty"), reason="needs pseudo-terminals")


class Pty:
    """A pseudo-terminal pair; ``path`` is the device a reader opens."""

    def __init__(self):
        self.master, self.slave = os.openpty()
        self.path = os.ttyname(self.slave)

    def write(self, data: bytes) -> None:
        os.write(self.master, data)

    def close(self) -> None:
        for fd in (self.master, self.slave):
            try:
                os.close(fd)
            except OSError:
                pass


@pytest.fixture
def pty_pair():
    pairs = []

    def make():
        pairs.append(Pty())
        return pairs[-1]

    yield make
    for p in pairs:
        p.close()


def poll_until(feed, want: int, timeout: float = 5 * second) -> list[str]:
    got = []
    end = time.monotonic() + timeout
    while len(got) < want and time.monotonic() < end:
        got += [line.text for line in feed.poll()]
        time.sleep(0.01)
    return got


def quick_feed(port: str) -> SerialFeed:
    return SerialFeed("gauge", port, baud=9600, reopen_after=0.02, reopen_max=0.1)


def test_lines_written_at_master_arrive(pty_pair):
    pty = pty_pair()
    feed = quick_feed(pty.path)
    assert feed.poll() == []                    # opens the port
    pty.write(b"2031-03-01T00:00Z,1.25\r\n2031-03-01T00:01Z,1.26\r\n")
    assert poll_until(feed, 2) == ["2031-03-01T00:00Z,1.25", "2031-03-01T00:01Z,1.26"]
    feed.close()


def test_line_split_across_writes_is_joined(pty_pair):
    pty = pty_pair()
    feed = quick_feed(pty.path)
    feed.poll()
    pty.write(b"1.2")
    assert poll_until(feed, 1, timeout=0.2) == []
    pty.write(b"5\n")
    assert poll_until(feed, 1) == ["1.25"]
    feed.close()


def test_raw_lines_carry_port_and_no_line_number(pty_pair):
    pty = pty_pair()
    feed = quick_feed(pty.path)
    feed.poll()
    pty.write(b"x\n")
    lines = []
    end = time.monotonic() + 5 * second
    while not lines and time.monotonic() < end:
        lines = feed.poll()
    assert (lines[0].source, lines[0].lineno) == (pty.path, None)
    feed.close()


def test_device_gone_and_back_via_symlink_resumes_reading(pty_pair, tmp_path):
    link = tmp_path / "ttyGAUGE"
    first = pty_pair()
    link.symlink_to(first.path)
    feed = quick_feed(str(link))
    feed.poll()
    first.write(b"before\n")
    assert poll_until(feed, 1) == ["before"]

    first.close()                               # the device vanishes
    assert poll_until(feed, 1, timeout=0.3) == []
    assert not feed.is_open and feed.last_error
    assert feed.state()["failures"] >= 1

    second_pty = pty_pair()                     # and comes back as another pty
    link.unlink()
    link.symlink_to(second_pty.path)
    end = time.monotonic() + 5 * second
    while not feed.is_open and time.monotonic() < end:
        feed.poll()
        time.sleep(0.01)
    second_pty.write(b"after\n")
    assert poll_until(feed, 1) == ["after"]
    assert feed.last_error is None
    feed.close()


def test_back_off_doubles_up_to_maximum(tmp_path):
    feed = SerialFeed("gauge", str(tmp_path / "no-such-tty"), reopen_after=0.01,
                      reopen_max=0.04)
    waits = []
    for _ in range(5):
        feed._next_open = 0.0                   # let each attempt happen now
        feed.poll()
        waits.append(feed._delay)
    # after each failure the next wait doubles: 0.02, 0.04, then capped at reopen_max
    assert waits == pytest.approx([0.02, 0.04, 0.04, 0.04, 0.04])


def test_state_holds_counters_only_and_restores(pty_pair):
    pty = pty_pair()
    feed = quick_feed(pty.path)
    feed.poll()
    pty.write(b"a\nb\n")
    poll_until(feed, 2)
    state = feed.state()
    assert state["lines"] == 2 and state["opens"] == 1
    feed.close()
    again = quick_feed(pty.path)
    again.restore(state)
    assert again.state()["lines"] == 2


def test_framing_names_map_to_pyserial_constants():
    # pyserial API documentation: PARITY_* are 'N','E','O','M','S'; STOPBITS_* 1, 1.5, 2.
    assert PARITIES == {"none": "N", "even": "E", "odd": "O", "mark": "M", "space": "S"}
    assert STOPBITS == {1: 1, 1.5: 1.5, 2: 2}


def test_open_feed_passes_framing_to_the_port(pty_pair):
    pty = pty_pair()
    spec, errors = feed_from_config(
        {"kind": "serial", "port": pty.path, "baud": 4800, "bytesize": 7, "parity": "even",
         "stopbits": 2}, "feeds.gauge")
    assert errors == []
    feed = open_feed(spec, "gauge")
    feed.poll()
    dev = feed._dev
    assert (dev.baudrate, dev.bytesize, dev.parity, dev.stopbits) == (
        4800, 7, serial.PARITY_EVEN, serial.STOPBITS_TWO)
    feed.close()


# --------------------------------------------------------------------------- raw capture

def test_each_line_read_is_in_the_capture_file_before_the_poll_returns(pty_pair, tmp_path):
    from monitor.feeds.capture import MAGIC, read_capture

    pty = pty_pair()
    feed = SerialFeed("gauge", pty.path, reopen_after=0.02, reopen_max=0.1, capture_dir=str(tmp_path / "cap"))
    feed.poll()
    pty.write(b"2031-03-01T00:00Z,1.25\r\n\xff\xfe junk\r\n2031-03-01T00:01Z,1.2")  # the last line unfinished
    lines = []
    end = time.monotonic() + 5 * second
    while len(lines) < 2 and time.monotonic() < end:
        lines += feed.poll()
        time.sleep(0.01)
    (path,) = (tmp_path / "cap").iterdir()
    assert path.name == time.strftime("%Y-%m-%d", time.gmtime(lines[0].received)) + ".capture"
    assert path.read_bytes().startswith(MAGIC)
    ((raws, recv, _, bad, _),) = list(read_capture(path, 100))
    assert raws == [b"2031-03-01T00:00Z,1.25", b"\xff\xfe junk"] and bad == []  # the bytes as received
    assert recv == [ln.received for ln in lines]                                # the very same times
    pty.write(b"6\n")
    assert poll_until(feed, 1) == ["2031-03-01T00:01Z,1.26"]
    assert list(read_capture(path, 100))[0][0][-1] == b"2031-03-01T00:01Z,1.26"
    feed.close()


def test_a_record_cut_short_by_a_crash_is_reported_not_read(tmp_path):
    from monitor.feeds.capture import RawCapture, read_capture

    cap = RawCapture(tmp_path, "gauge", "/dev/null")
    cap.append([b"2031-03-01T00:00Z,1.25"], 1_900_000_000.25)
    cap.close()
    with open(next(tmp_path.iterdir()), "ab") as fh:
        fh.write(b"1900000001.5\t2031-03-01T00:0")  # no line end: the power went
    ((raws, recv, linenos, bad, _),) = list(read_capture(next(tmp_path.iterdir()), 100))
    assert raws == [b"2031-03-01T00:00Z,1.25"] and recv == [1_900_000_000.25] and linenos == [2]
    assert [n for n, _ in bad] == [3]
