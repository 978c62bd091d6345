"""Drop folder: each file read once, in name order, across restarts, with a bounded checkpoint.

Taking each delivered file once and leaving half-written ones until they settle is how drop
folders for instrument uploads are usually handled (common practice, no source).
"""
from __future__ import annotations

import json
import os
import time

from monitor.feeds import feed_from_config, open_feed
from monitor.feeds.dropfolder import FolderFeed


def write(path, data: bytes, age: float = 0.0) -> None:
    path.write_bytes(data)
    if age:
        then = time.time() - age
        os.utime(path, (then, then))


def texts(lines) -> list[str]:
    return [line.text for line in lines]


def drain(feed) -> list[str]:
    got = []
    for _ in range(50):
        got += texts(feed.poll())
        if feed.exhausted:
            break
    return got


def restart(feed: FolderFeed, **kwargs) -> FolderFeed:
    state = json.loads(json.dumps(feed.state()))
    feed.close()
    again = FolderFeed(feed.name, feed.folder, pattern=feed.pattern, settle=feed.settle, **kwargs)
    again.restore(state)
    return again


def test_each_file_read_once_in_name_order(tmp_path):
    write(tmp_path / "b.csv", b"b1\nb2\n")
    write(tmp_path / "a.csv", b"a1\n")
    feed = FolderFeed("drop", str(tmp_path), pattern="*.csv", settle=0)
    assert drain(feed) == ["a1", "b1", "b2"]
    assert feed.exhausted
    assert feed.poll() == []


def test_lines_name_their_file_and_number(tmp_path):
    write(tmp_path / "a.csv", b"x\ny\n")
    lines = FolderFeed("drop", str(tmp_path), settle=0).poll()
    assert [(line.source, line.lineno) for line in lines] == [
        (str(tmp_path / "a.csv"), 1), (str(tmp_path / "a.csv"), 2)]


def test_pattern_excludes_other_files(tmp_path):
    write(tmp_path / "a.csv", b"keep\n")
    write(tmp_path / "notes.txt", b"skip\n")
    assert drain(FolderFeed("drop", str(tmp_path), pattern="*.csv", settle=0)) == ["keep"]


def test_unterminated_last_line_of_a_file_is_returned(tmp_path):
    write(tmp_path / "a.csv", b"x\nlast")
    assert drain(FolderFeed("drop", str(tmp_path), settle=0)) == ["x", "last"]


def test_new_file_dropped_later_is_picked_up(tmp_path):
    write(tmp_path / "a.csv", b"a\n")
    feed = FolderFeed("drop", str(tmp_path), settle=0)
    drain(feed)
    write(tmp_path / "b.csv", b"b\n")
    assert drain(feed) == ["b"]


def test_files_taken_once_across_restart(tmp_path):
    write(tmp_path / "a.csv", b"a\n")
    feed = FolderFeed("drop", str(tmp_path), settle=0)
    drain(feed)
    write(tmp_path / "b.csv", b"b\n")
    feed = restart(feed)
    assert drain(feed) == ["b"]


def test_restart_inside_a_large_file_resumes_there(tmp_path):
    write(tmp_path / "a.csv", b"".join(b"%03d\n" % i for i in range(50)))
    feed = FolderFeed("drop", str(tmp_path), settle=0, chunk=40)
    first = texts(feed.poll())
    assert 0 < len(first) < 50
    feed = restart(feed, chunk=40)
    assert first + drain(feed) == ["%03d" % i for i in range(50)]


def test_file_still_settling_is_left_for_later(tmp_path):
    write(tmp_path / "fresh.csv", b"f\n")
    feed = FolderFeed("drop", str(tmp_path), settle=3600)
    assert feed.poll() == []
    assert not feed.exhausted
    write(tmp_path / "fresh.csv", b"f\n", age=7200)
    assert drain(feed) == ["f"]


def test_replaced_file_with_same_name_is_read_again(tmp_path):
    write(tmp_path / "a.csv", b"old\n", age=100)
    feed = FolderFeed("drop", str(tmp_path), settle=0)
    drain(feed)
    write(tmp_path / "a.csv", b"newer\n", age=10)
    assert drain(feed) == ["newer"]


def test_checkpoint_forgets_files_no_longer_present(tmp_path):
    for i in range(5):
        write(tmp_path / f"f{i}.csv", b"x\n")
    feed = FolderFeed("drop", str(tmp_path), settle=0)
    drain(feed)
    assert len(feed.state()["done"]) == 5
    for i in range(4):
        os.remove(tmp_path / f"f{i}.csv")
    feed.poll()
    assert [entry[0] for entry in feed.state()["done"]] == ["f4.csv"]


def test_missing_folder_reports_problem_without_raising(tmp_path):
    feed = FolderFeed("drop", str(tmp_path / "absent"), settle=0)
    assert feed.poll() == []
    assert "absent" in feed.last_error


def test_subfolders_with_double_star_pattern(tmp_path):
    (tmp_path / "2031" / "03").mkdir(parents=True)
    write(tmp_path / "2031" / "03" / "d01.csv", b"deep\n")
    assert drain(FolderFeed("drop", str(tmp_path), pattern="**/*.csv", settle=0)) == ["deep"]


def test_open_feed_from_config_reads_folder(tmp_path):
    write(tmp_path / "a.csv", b"cfg\n", age=60)
    spec, errors = feed_from_config(
        {"kind": "folder", "path": str(tmp_path), "pattern": "*.csv", "settle": 5}, "feeds.drop")
    assert errors == []
    with open_feed(spec, "drop") as feed:
        assert drain(feed) == ["cfg"]
