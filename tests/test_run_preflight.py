"""Everything is checked before anything is created: `run` with a broken constants file
leaves no store, lock file or folder behind; `check` refuses a store that could not be
created. Invented station."""
from __future__ import annotations

from pathlib import Path

import pytest

from monitor.cli import main


def _config(tmp: Path, store: str, constants: str = "constants.toml") -> Path:
    cfg = tmp / "config.toml"
    cfg.write_text(f"""
[store]
path = "{store}"
[[stations]]
id = "testport"
latitude = 50.0
longitude = -4.0
constants = "{constants}"
datums = {{ chart = -1.0 }}
[stations.sensors.primary]
feed = {{ kind = "file", path = "gauge.csv" }}
""")
    return cfg


def _error(capsys) -> str:
    err = capsys.readouterr().err
    assert err.startswith("quaywatch ") and "Traceback" not in err, err
    return err


def test_run_with_a_broken_constants_file_creates_nothing(tmp_path, capsys):
    (tmp_path / "constants.toml").write_text("mean = 2.0\n[[constituents]]\nname = \"M2\"\namplitude = \"big\"\n")
    cfg = _config(tmp_path, "data/q.db")
    assert main(["run", str(cfg)]) == 2
    assert "constants" in _error(capsys)
    assert sorted(p.name for p in tmp_path.iterdir()) == ["config.toml", "constants.toml"]


def test_run_with_a_missing_constants_file_creates_nothing(tmp_path, capsys):
    cfg = _config(tmp_path, "q.db", constants="nowhere.toml")
    assert main(["run", str(cfg)]) == 2
    assert "nowhere.toml" in _error(capsys)
    assert sorted(p.name for p in tmp_path.iterdir()) == ["config.toml"]


@pytest.mark.parametrize("verb", ["check", "run"])
def test_a_store_folder_under_a_file_is_refused(tmp_path, capsys, verb):
    (tmp_path / "constants.toml").write_text('mean = 2.0\n[[constituents]]\nname = "M2"\namplitude = 1.0\nphase = 40.0\n')
    (tmp_path / "notes.txt").write_text("a file, not a folder\n")
    cfg = _config(tmp_path, "notes.txt/data/q.db")
    assert main([verb, str(cfg)]) == 2
    line = _error(capsys)
    assert "store.path" in line and "notes.txt" in line and "is a file" in line
    assert sorted(p.name for p in tmp_path.iterdir()) == ["config.toml", "constants.toml", "notes.txt"]


def test_check_refuses_a_store_path_that_is_a_folder(tmp_path, capsys):
    (tmp_path / "constants.toml").write_text('mean = 2.0\n[[constituents]]\nname = "M2"\namplitude = 1.0\nphase = 40.0\n')
    (tmp_path / "q.db").mkdir()
    cfg = _config(tmp_path, "q.db")
    assert main(["check", str(cfg)]) == 2
    assert "store.path" in _error(capsys)


def test_check_accepts_a_store_folder_still_to_be_made_and_makes_nothing(tmp_path, capsys):
    (tmp_path / "constants.toml").write_text('mean = 2.0\n[[constituents]]\nname = "M2"\namplitude = 1.0\nphase = 40.0\n')
    cfg = _config(tmp_path, "data/deeper/q.db")
    assert main(["check", str(cfg)]) == 0
    assert "configuration is valid" in capsys.readouterr().out
    assert not (tmp_path / "data").exists()


def test_check_refuses_a_password_file_others_may_read(tmp_path, capsys):
    (tmp_path / "constants.toml").write_text('mean = 2.0\n[[constituents]]\nname = "M2"\namplitude = 1.0\nphase = 40.0\n')
    cfg = _config(tmp_path, "q.db")
    (tmp_path / "smtp.pw").write_text("hunter2\n")
    (tmp_path / "smtp.pw").chmod(0o644)
    cfg.write_text(cfg.read_text() + """
[mail]
sender = "gauge@testport.example"
host = "smtp.testport.example"
user = "gauge"
password_file = "smtp.pw"
""")
    assert main(["check", str(cfg)]) == 2
    err = _error(capsys)
    assert "mail.password_file" in err and f"chmod o-rwx {tmp_path / 'smtp.pw'}" in err
    (tmp_path / "smtp.pw").chmod(0o600)
    assert main(["check", str(cfg)]) == 0
