"""Configuration loading and validation (monitor.service.config)."""
from __future__ import annotations

import copy
import tomllib
from pathlib import Path

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from monitor.service.config import Config, load_config, validate_config
from monitor.errors import ConfigError

ROOT = Path(__file__).resolve().parent.parent


def base_raw() -> dict:
    """A small valid configuration (invented station)."""
    return {
        "store": {"path": "q.db"},
        "stations": [{
            "id": "testport", "name": "Test Port (invented)", "latitude": 50.0, "longitude": -4.0,
            "tz": "Europe/Lisbon", "constants": "history", "datums": {"chart": -1.5},
            "sensors": {"primary": {"units": "cm", "offset": 0.25,
                                    "line": {"delimiter": ",", "time_column": 1, "value_column": 2}}},
        }],
    }


def test_example_configuration_is_valid():
    cfg = load_config(ROOT / "config.example.toml")
    assert isinstance(cfg, Config)
    assert cfg.stations[0].datums["chart"] == pytest.approx(1.0)


def test_display_datum_is_chart_datum_where_its_offset_is_given():
    cfg, errors = validate_config(base_raw(), "/tmp")
    st = cfg.stations[0]
    assert errors == [] and st.display_datum == "chart" and st.display_label == "chart datum"
    assert st.display_offset == pytest.approx(-1.5) and st.datum_note == ""


def test_station_without_chart_datum_shows_the_station_datum_and_says_so():
    raw = base_raw()
    del raw["stations"][0]["datums"]
    cfg, errors = validate_config(raw, "/tmp")
    st = cfg.stations[0]
    assert errors == [] and st.display_datum == "station" and st.display_offset == 0.0
    assert "no chart datum offset" in st.datum_note


def test_display_datum_may_name_another_datum_of_the_station():
    raw = base_raw()
    raw["stations"][0]["datums"]["lat"] = -1.9
    raw["stations"][0]["display_datum"] = "lat"
    cfg, errors = validate_config(raw, "/tmp")
    assert errors == [] and cfg.stations[0].display_offset == pytest.approx(-1.9)
    assert cfg.stations[0].display_label == "lat datum"


def test_display_datum_the_station_lacks_is_refused_with_its_key_path():
    raw = base_raw()
    raw["stations"][0]["display_datum"] = "lat"
    cfg, errors = validate_config(raw, "/tmp")
    assert cfg is None
    assert any(e.startswith("stations[0].display_datum: expected a datum of this station") for e in errors)


def test_a_datum_named_station_is_refused():
    raw = base_raw()
    raw["stations"][0]["datums"]["station"] = 0.3
    _, errors = validate_config(raw, "/tmp")
    assert any(e.startswith("stations[0].datums.station:") for e in errors)


def test_units_become_a_scale_factor_and_offset_is_kept():
    cfg, errors = validate_config(base_raw(), "/tmp")
    assert errors == []
    fmt = cfg.stations[0].primary.format
    assert fmt.scale == 0.01 and fmt.offset == 0.25


def test_several_problems_are_listed_at_once_with_key_paths():
    raw = base_raw()
    raw["colour"] = "blue"                                   # unknown key
    raw["stations"][0]["latitude"] = 123.0                   # impossible value
    raw["stations"][0]["tz"] = 5                             # wrong type
    del raw["stations"][0]["longitude"]                      # missing required key
    raw["stations"][0]["sensors"]["primary"]["unit"] = "m"   # misspelt key
    cfg, errors = validate_config(raw, "/tmp")
    assert cfg is None
    text = "\n".join(errors)
    assert "colour: unknown key" in text
    assert "stations[0].latitude: expected degrees from -90 to 90" in text
    assert "stations[0].tz: expected an IANA time zone" in text
    assert "stations[0].longitude: missing" in text
    assert "stations[0].sensors.primary.unit: unknown key (did you mean 'units'?)" in text
    assert len(errors) == 5


def test_load_config_raises_one_user_error_listing_every_problem(tmp_path):
    path = tmp_path / "bad.toml"
    path.write_text('[daemon]\npoll_seconds = -1\nidle_polls = "x"\n')
    with pytest.raises(ConfigError) as exc:
        load_config(path)
    msg = str(exc.value)
    assert "daemon.poll_seconds" in msg and "daemon.idle_polls" in msg and "stations: missing" in msg


def test_bad_toml_names_the_file(tmp_path):
    path = tmp_path / "broken.toml"
    path.write_text("[store\npath = 1\n")
    with pytest.raises(ConfigError, match="broken.toml: not valid TOML"):
        load_config(path)


def test_relative_paths_resolve_against_the_config_folder(tmp_path):
    (tmp_path / "sub").mkdir()
    (tmp_path / "sub" / "c.toml").write_text("mean = 0.0\n")
    raw = base_raw()
    raw["stations"][0]["constants"] = "sub/c.toml"
    raw["logging"] = {"file": "logs/q.log"}
    cfg, errors = validate_config(raw, tmp_path)
    assert errors == []
    assert cfg.store_path == tmp_path / "q.db"
    assert cfg.stations[0].constants == tmp_path / "sub" / "c.toml"
    assert cfg.logging.file == tmp_path / "logs" / "q.log"


def test_missing_constants_file_is_reported(tmp_path):
    raw = base_raw()
    raw["stations"][0]["constants"] = "nowhere.toml"
    _, errors = validate_config(raw, tmp_path)
    assert any(e.startswith("stations[0].constants: file") for e in errors)


def test_duplicate_station_ids_are_refused():
    raw = base_raw()
    raw["stations"].append(copy.deepcopy(raw["stations"][0]))
    _, errors = validate_config(raw, "/tmp")
    assert errors == ["stations[1].id: 'testport' is used by an earlier station; ids must be unique"]


# -- property tests: any TOML-ish value gives a Config or messages, never an exception

toml_scalars = st.one_of(
    st.none(), st.booleans(), st.integers(min_value=-2**63, max_value=2**63 - 1),
    st.floats(allow_nan=True, allow_infinity=True), st.text(max_size=20),
    st.sampled_from(["m", "cm", "ft", "hPa", "iso", "epoch", "whitespace", "history", "UTC", "Europe/Dublin",
                     "primary", "", "../../etc", "chart"]),
)
toml_values = st.recursive(
    toml_scalars,
    lambda inner: st.one_of(st.lists(inner, max_size=4),
                            st.dictionaries(st.text(max_size=12), inner, max_size=4)),
    max_leaves=12,
)
KEYS = ["store", "daemon", "logging", "residual", "stations", "mail", "reports", "id", "name", "latitude",
        "longitude", "tz", "datums", "constants", "sensors", "primary", "backup", "barometer", "units",
        "offset", "line", "feed", "time_column", "value_column", "delimiter", "chart", "qc", "rules", "kind",
        "path"]


def _paths(obj, prefix=()):
    yield prefix
    if isinstance(obj, dict):
        for k, v in obj.items():
            yield from _paths(v, prefix + (k,))
    elif isinstance(obj, list):
        for i, v in enumerate(obj):
            yield from _paths(v, prefix + (i,))


def _outcome_is_well_formed(result):
    cfg, errors = result
    assert isinstance(errors, list)
    if cfg is None:
        assert errors and all(isinstance(e, str) and e for e in errors)
    else:
        assert isinstance(cfg, Config) and errors == []


@settings(max_examples=150, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(data=st.data())
def test_mutated_configuration_never_crashes(data, tmp_path_factory):
    raw = base_raw()
    paths = [p for p in _paths(raw) if p]
    for _ in range(data.draw(st.integers(1, 3))):
        path = data.draw(st.sampled_from(paths))
        parent = raw
        for k in path[:-1]:
            parent = parent[k]
        if data.draw(st.booleans()):
            parent[path[-1]] = data.draw(toml_values)
        elif isinstance(parent, dict):
            parent[data.draw(st.sampled_from(KEYS))] = data.draw(toml_values)
        paths = [p for p in _paths(raw) if p]
    _outcome_is_well_formed(validate_config(raw, "/tmp"))


@settings(max_examples=150, deadline=None)
@given(raw=st.dictionaries(st.sampled_from(KEYS) | st.text(max_size=8), toml_values, max_size=6))
def test_arbitrary_tables_never_crash(raw):
    _outcome_is_well_formed(validate_config(raw, "/tmp"))


# --------------------------------------------------------------------------- the example documents every key

EXAMPLE = ROOT / "config.example.toml"


def _example() -> tuple[dict, str]:
    text = EXAMPLE.read_text(encoding="utf-8")
    return tomllib.loads(text), text


def _commented_keys(text: str) -> set[str]:
    """Keys shown commented out ("# key = value"): optional keys and alternatives."""
    import re

    return {m.group(1) for m in re.finditer(r"^\s*#\s*([A-Za-z_][A-Za-z0-9_]*)\s*=", text, re.M)}


def _known_from_message(errors: list[str]) -> set[str]:
    """The key list a validator gives with an unknown key ("... (known: a, b, c)")."""
    import re

    (m,) = [re.search(r"known(?: keys)?: ([^)]*)\)", e) for e in errors if "unknown key" in e]
    return {k.strip() for k in m.group(1).split(",")}


def test_quaywatch_check_passes_on_the_example():
    import subprocess
    import sys

    res = subprocess.run([sys.executable, "-m", "monitor", "check", str(EXAMPLE)], capture_output=True,
                         text=True, cwd=ROOT, timeout=120)
    assert res.returncode == 0, res.stderr
    assert "configuration is valid" in res.stdout


def test_example_documents_every_key_of_the_loader():
    from monitor.service.config import known_keys

    raw, text = _example()
    st = raw["stations"][0]
    tables = {"": raw, "store": raw["store"], "daemon": raw["daemon"], "logging": raw["logging"],
              "residual": raw["residual"], "stations": st, "stations.sensors": st["sensors"]}
    shown_sensor = set().union(*(set(s) for s in st["sensors"].values()))
    shown_line = set().union(*(set(s.get("line", {})) for s in st["sensors"].values()))
    for table, keys in known_keys().items():
        shown = {"stations.sensors.*": shown_sensor, "stations.sensors.*.line": shown_line}.get(table)
        if shown is None:
            shown = set(tables[table])
        assert set(keys) <= shown | _commented_keys(text), (table, set(keys) - shown)
    assert set(known_keys()["stations.sensors.*.line"]) <= set(st["sensors"]["primary"]["line"])


def test_example_documents_every_feed_key_and_kind():
    from monitor.feeds.spec import ALL_KEYS, KINDS

    raw, text = _example()
    feeds = [s["feed"] for s in raw["stations"][0]["sensors"].values()]
    shown = set().union(*(set(f) for f in feeds)) | _commented_keys(text)
    assert ALL_KEYS | {"kind"} <= shown, ALL_KEYS - shown
    kinds = {f["kind"] for f in feeds} | set(__import__("re").findall(r'#\s*kind = "(\w+)"', text))
    assert set(KINDS) <= kinds


def test_example_documents_every_qc_setting_with_its_default():
    from dataclasses import fields

    from monitor.quality.checks import QcSettings, qc_settings_from

    raw, text = _example()
    qc = raw["stations"][0]["qc"]
    names = {f.name for f in fields(QcSettings)}
    assert names <= set(qc) | _commented_keys(text), names - set(qc)
    # the values shown active are the defaults, so the comment "each value below is the default" holds
    assert qc_settings_from(qc, "qc") == (QcSettings(), [])


def test_example_documents_every_mail_key():
    from alerts.mail.outbox import mail_settings_from

    raw, text = _example()
    _, errors = mail_settings_from({**raw["mail"], "no_such_key": 1}, "mail")
    known = _known_from_message(errors)
    assert known <= set(raw["mail"]) | _commented_keys(text), known - set(raw["mail"])


def test_example_documents_every_report_key():
    from alerts.reports.model import report_settings_from

    raw, text = _example()
    _, errors = report_settings_from({**raw["reports"], "no_such_key": 1}, "reports")
    known = _known_from_message(errors)
    assert known <= set(raw["reports"]), known - set(raw["reports"])


def test_example_has_a_rule_of_every_kind_using_every_rule_key():
    from alerts.rules import KINDS, rules_from_config

    raw, _ = _example()
    st = raw["stations"][0]
    rules = st["rules"]
    assert {r["when"] for r in rules} == set(KINDS)
    _, errors = rules_from_config([{**rules[0], "no_such_key": 1}], "rules", st["datums"])
    known = _known_from_message(errors)
    assert known <= set().union(*(set(r) for r in rules)), known
    _, errors = rules_from_config([{**rules[0], "steps": [{"at": 0.5, "no_such_key": 1}]}], "rules", st["datums"])
    step_known = _known_from_message(errors)
    assert step_known <= set().union(*(set(s) for r in rules for s in r["steps"]))
