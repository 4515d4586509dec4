"""Config loading and validation, through real YAML files in tmp_path."""

from __future__ import annotations

import dataclasses
import re
from pathlib import Path

import pytest
import yaml

from streamcount.config.load import (
    FINGERPRINT_KEYS,
    apply_overrides,
    check_config_main,
    config_from_mapping,
    config_to_mapping,
    describe,
    fingerprint,
    fingerprint_settings,
    load_config,
    parse_listen,
)
from streamcount.config.settings import DEFAULT_LISTEN, DEFAULT_PORT, Config, EngineConfig
from streamcount.errors import ConfigError

CONFIG_DIR = Path(__file__).resolve().parent.parent / "config"


def _all_dotted_keys(cls: type, prefix: str = "") -> set[str]:
    out: set[str] = set()
    for f in dataclasses.fields(cls):
        default = f.default_factory() if f.default_factory is not dataclasses.MISSING else None
        if dataclasses.is_dataclass(default):
            out |= _all_dotted_keys(type(default), f"{prefix}{f.name}.")
        else:
            out.add(f"{prefix}{f.name}")
    return out


def _mapping_keys(data: dict, prefix: str = "") -> set[str]:
    out: set[str] = set()
    for key, value in data.items():
        if isinstance(value, dict):
            out |= _mapping_keys(value, f"{prefix}{key}.")
        else:
            out.add(f"{prefix}{key}")
    return out


def _write(tmp_path: Path, text: str, name: str = "cfg.yaml") -> Path:
    path = tmp_path / name
    path.write_text(text, encoding="utf-8")
    return path


# --- the shipped files ------------------------------------------------------------------------


def test_default_yaml_equals_dataclass_defaults() -> None:
    assert load_config(CONFIG_DIR / "default.yaml") == Config()


def test_default_yaml_lists_every_key() -> None:
    raw = yaml.safe_load((CONFIG_DIR / "default.yaml").read_text(encoding="utf-8"))
    assert _mapping_keys(raw) == _all_dotted_keys(Config)


def test_default_yaml_comments_every_key() -> None:
    # each key line has a comment on the line(s) right above it (a nested section's first key
    # may share the comment block of the section header only if it has its own comment)
    lines = (CONFIG_DIR / "default.yaml").read_text(encoding="utf-8").splitlines()
    uncommented = []
    for i, line in enumerate(lines):
        match = re.match(r"^( *)([a-z_]+):(.*)$", line)
        if not match or not match.group(3).strip():
            continue  # a section header or not a key
        if "#" in match.group(3):
            continue
        if not lines[i - 1].lstrip().startswith("#"):
            uncommented.append(match.group(2))
    assert uncommented == []


@pytest.mark.parametrize("name", ["dev.yaml", "example-prod.yaml"])
def test_profiles_load_and_differ_from_defaults(name: str) -> None:
    cfg = load_config(CONFIG_DIR / name)
    assert cfg != Config()
    assert check_config_main(CONFIG_DIR / name) == 0


def test_dev_profile_is_small_and_nearly_exact() -> None:
    cfg = load_config(CONFIG_DIR / "dev.yaml")
    assert cfg.engine.window_size <= 5000
    assert cfg.engine.epsilon <= 0.01
    assert cfg.sinks.file is not None


# --- loading ----------------------------------------------------------------------------------


def test_empty_file_gives_defaults(tmp_path: Path) -> None:
    assert load_config(_write(tmp_path, "")) == Config()
    assert load_config(_write(tmp_path, "# only a comment\n", "c.yaml")) == Config()


def test_empty_section_gives_section_defaults(tmp_path: Path) -> None:
    assert load_config(_write(tmp_path, "engine:\n  # nothing yet\n")) == Config()


def test_values_are_read_and_ints_become_floats(tmp_path: Path) -> None:
    text = "engine:\n  window_seconds: 3600\n  pane_seconds: 600\nrules:\n  min_lift: 2\n"
    cfg = load_config(_write(tmp_path, text))
    assert cfg.engine.window_seconds == 3600.0
    assert isinstance(cfg.engine.window_seconds, float)
    assert isinstance(cfg.rules.min_lift, float)


def test_logging_level_is_case_insensitive(tmp_path: Path) -> None:
    assert load_config(_write(tmp_path, "logging:\n  level: debug\n")).logging.level == "DEBUG"


def test_missing_file_says_no_such_file_and_names_it_once(tmp_path: Path, capsys) -> None:
    missing = tmp_path / "nope.yaml"
    with pytest.raises(ConfigError, match="no such file") as info:
        load_config(missing)
    assert str(info.value).count(str(missing)) == 1
    assert "encoding" not in str(info.value) and "UTF-8" not in str(info.value)
    assert check_config_main(missing) == 2
    err = capsys.readouterr().err.strip()
    assert err.count(str(missing)) == 1 and "no such file" in err


def test_a_file_that_is_not_utf8_is_named_with_the_byte(tmp_path: Path) -> None:
    path = tmp_path / "latin.yaml"
    path.write_bytes(b"engine:\n  epsilon: 0.01 # caf\xe9\n")
    with pytest.raises(ConfigError, match="not UTF-8 text") as info:
        load_config(path)
    assert "byte 29" in str(info.value)


def test_yaml_syntax_error_names_line_and_column(tmp_path: Path) -> None:
    path = _write(tmp_path, "engine:\n  epsilon: 0.1\n  window_size: [1, 2\n")
    with pytest.raises(ConfigError) as info:
        load_config(path)
    assert re.search(r"line \d+, column \d+", str(info.value))
    assert "not valid YAML" in str(info.value)


def test_top_level_must_be_a_mapping(tmp_path: Path) -> None:
    with pytest.raises(ConfigError, match="top level must be a mapping"):
        load_config(_write(tmp_path, "- engine\n- rules\n"))


def test_duplicate_key_is_refused(tmp_path: Path) -> None:
    with pytest.raises(ConfigError, match="given twice"):
        load_config(_write(tmp_path, "engine:\n  epsilon: 0.1\n  epsilon: 0.2\n"))


# A table of bad configs: (yaml text, dotted key, words of the rule).
BAD_CONFIGS = [
    ("engine:\n  epsilon: 1.0\n", "engine.epsilon", "must be in [0, 1)"),
    ("engine:\n  epsilon: -0.1\n", "engine.epsilon", "must be in [0, 1)"),
    ("engine:\n  max_itemset_size: 9\n", "engine.max_itemset_size", "between 1 and 8"),
    ("engine:\n  max_itemset_size: true\n", "engine.max_itemset_size", "must be int, not bool"),
    ("engine:\n  max_basket_items: 0\n", "engine.max_basket_items", ">= 1"),
    ("engine:\n  epsilon: null\n", "engine.epsilon", "must not be null"),
    ("engine:\n  epsilon: fast\n", "engine.epsilon", "must be float, not str"),
    (
        "engine:\n  window_size: 1000\n  pane_size: 300\n",
        "engine.window_size",
        "multiple of engine.pane_size",
    ),
    (
        "engine:\n  window_size: 100\n  pane_size: 200\n",
        "engine.pane_size",
        "<= engine.window_size",
    ),
    (
        "engine:\n  window_seconds: 3600\n",
        "engine.window_seconds",
        "needs engine.pane_seconds",
    ),
    (
        "engine:\n  window_seconds: 1000\n  pane_seconds: 300\n",
        "engine.window_seconds",
        "multiple of engine.pane_seconds",
    ),
    (
        "engine:\n  window_seconds: 600\n  pane_seconds: 60\n  allowed_lateness_seconds: 600\n",
        "engine.allowed_lateness_seconds",
        "< engine.window_seconds",
    ),
    ("engine:\n  allowed_lateness_seconds: -1\n", "engine.allowed_lateness_seconds", ">= 0"),
    ("engine:\n  epsilon: .nan\n", "engine.epsilon", "finite"),
    ("engine:\n  epslion: 0.1\n", "engine.epslion", "did you mean 'epsilon'"),
    ("engine:\n  min_support: 0.1\n", "engine.min_support", "'rules.min_support'"),
    ("rules:\n  min_support: 0\n", "rules.min_support", "must be in (0, 1]"),
    ("rules:\n  min_confidence: 1.5\n", "rules.min_confidence", "must be in [0, 1]"),
    ("rules:\n  min_lift: -1\n", "rules.min_lift", ">= 0"),
    ("rules:\n  exit_ratio: 0\n", "rules.exit_ratio", "(0, 1]"),
    ("rules:\n  confirm_evaluations: 2\n", "rules.confirm_evaluations", "was retired"),
    ("rules:\n  cooldown_evaluations: 2\n", "rules.cooldown_evaluations", "was retired"),
    (
        "alerts:\n  surge_max_p_value: 0.01\n",
        "alerts.surge_max_p_value",
        "false_alerts_per_million",
    ),
    ("rules:\n  significance: bayes\n", "rules.significance", "'fisher', 'chi2'"),
    (
        "rules:\n  max_consequent_size: 3\n",
        "rules.max_consequent_size",
        "< engine.max_itemset_size (3)",
    ),
    ("input:\n  format: xml\n", "input.format", "'basket', 'jsonl', 'csv'"),
    ("input:\n  source: pigeon\n", "input.source", "'file', 'stdin', 'http'"),
    ("input:\n  source: [file, file]\n", "input.source", "once"),
    ("input:\n  source: []\n", "input.source", "at least one"),
    # a retired key names its replacement (CHANGELOG "Renamed")
    ("input:\n  http_ingest: true\n", "input.http_ingest", "input.source: [file, http]"),
    ("input:\n  path: '-'\n", "input.path", "input.source: stdin"),
    ("input:\n  start_at: middle\n", "input.start_at", "'beginning', 'end'"),
    ("input:\n  encoding: klingon-8\n", "input.encoding", "text encoding"),
    ("input:\n  encoding: utf-16\n", "input.encoding", "ASCII-compatible"),
    ("input:\n  csv:\n    delimiter: ';;'\n", "input.csv.delimiter", "single character"),
    ("input:\n  csv:\n    delimiter: '\"'\n", "input.csv.delimiter", "other than a quote"),
    (
        "input:\n  format: csv\n  csv:\n    header: false\n",
        "input.csv.order_field",
        "0-based number",
    ),
    (
        "input:\n  format: csv\n  csv:\n    header: false\n    order_field: '0'\n"
        "    item_field: '1'\n    ts_field: '2'\n    quantity_field: qty\n",
        "input.csv.quantity_field",
        "0-based number",
    ),
    (
        "input:\n  source: [file, http]\nserver:\n  listen: null\n",
        "input.source",
        "server.listen",
    ),
    ("alerts:\n  growth_rate: 3.0\n", "alerts.growth_rate", "was retired"),
    ("alerts:\n  false_alerts_per_million: 0\n", "alerts.false_alerts_per_million", "(0, 1000000]"),
    ("alerts:\n  recent_panes: 10\n", "alerts.recent_panes", "< the window's panes (10"),
    ("server:\n  listen: localhost\n", "server.listen", "host:port"),
    ("server:\n  listen: 127.0.0.1:70000\n", "server.listen", "0..65535"),
    ("server:\n  token_env: 's3cr3t token!'\n", "server.token_env", "environment variable"),
    ("logging:\n  level: LOUD\n", "logging.level", "'DEBUG'"),
    ("logging:\n  format: xml\n", "logging.format", "'text', 'json'"),
    ("sinks:\n  webhook:\n    url: ftp://host/x\n", "sinks.webhook.url", "http:// or https://"),
    (
        "sinks:\n  webhook:\n    backoff_seconds: 10\n    max_backoff_seconds: 5\n",
        "sinks.webhook.max_backoff_seconds",
        ">= sinks.webhook.backoff_seconds",
    ),
    ("metrics:\n  top_rules: 5000\n", "metrics.top_rules", "between 0 and 1000"),
    ("engine: 5\n", "engine", "must be a mapping"),
    ("engines:\n  epsilon: 0.1\n", "engines", "did you mean 'engine'"),
]


@pytest.mark.parametrize(("text", "key", "rule"), BAD_CONFIGS)
def test_bad_config_names_key_and_rule(tmp_path: Path, text: str, key: str, rule: str) -> None:
    path = _write(tmp_path, text)
    with pytest.raises(ConfigError) as info:
        load_config(path)
    err = info.value
    assert err.key == key
    assert rule in err.rule
    assert str(err).startswith(f"{key} = ")
    assert err.source == str(path)


def test_exponent_without_dot_gets_a_hint(tmp_path: Path) -> None:
    # PyYAML follows YAML 1.1, where 1e-3 (no dot) is a string, not a float
    with pytest.raises(ConfigError, match=r"write it with a dot, e\.g\. 0\.001"):
        load_config(_write(tmp_path, "engine:\n  epsilon: 1e-3\n"))
    assert load_config(_write(tmp_path, "engine:\n  epsilon: 1.0e-3\n")).engine.epsilon == 0.001


def test_bool_accepted_only_for_bool(tmp_path: Path) -> None:
    with pytest.raises(ConfigError, match="must be bool, not int"):
        load_config(_write(tmp_path, "input:\n  follow: 1\n"))


def test_recent_panes_check_is_off_without_surge(tmp_path: Path) -> None:
    text = "engine:\n  window_size: 5000\n  pane_size: 5000\nalerts:\n  surge: false\n"
    assert load_config(_write(tmp_path, text)).engine.window_size == 5000


def test_time_window_with_valid_lateness(tmp_path: Path) -> None:
    text = "engine:\n  window_seconds: 0.3\n  pane_seconds: 0.1\n  allowed_lateness_seconds: 0.05\n"
    cfg = load_config(_write(tmp_path, text))
    assert cfg.engine.pane_seconds == 0.1  # 0.3 / 0.1 is 2.9999999999999996 in floating point


# --- overrides, mapping, fingerprint ----------------------------------------------------------


def test_apply_overrides_sets_dotted_keys_and_validates() -> None:
    cfg = apply_overrides(Config(), {"input.path": "orders.txt", "engine.epsilon": 0.01})
    assert cfg.input.path == "orders.txt"
    assert cfg.engine.epsilon == 0.01
    assert Config().engine.epsilon == 0.001  # the original is untouched
    with pytest.raises(ConfigError) as info:
        apply_overrides(cfg, {"rules.min_confidence": 2})
    assert info.value.key == "rules.min_confidence"


def test_apply_overrides_reads_strings_as_yaml_scalars() -> None:
    cfg = apply_overrides(
        Config(),
        {"engine.epsilon": "0", "input.follow": "false", "rules.max_p_value": "null"},
    )
    assert (cfg.engine.epsilon, cfg.input.follow, cfg.rules.max_p_value) == (0.0, False, None)
    # a key taking text keeps the text as given
    assert apply_overrides(Config(), {"input.path": "123"}).input.path == "123"


def test_apply_overrides_unknown_key_suggests() -> None:
    with pytest.raises(ConfigError, match=r"did you mean 'engine\.epsilon'"):
        apply_overrides(Config(), {"engine.epsilom": 0.1})


def test_config_to_mapping_round_trips() -> None:
    cfg = load_config(CONFIG_DIR / "example-prod.yaml")
    assert config_from_mapping(config_to_mapping(cfg)) == cfg


def test_fingerprint_follows_counting_settings_only() -> None:
    base = Config()
    assert fingerprint(base) == fingerprint(Config())
    assert len(fingerprint(base)) == 64
    assert set(fingerprint_settings(base)) == set(FINGERPRINT_KEYS)
    same = apply_overrides(
        base,
        {"rules.min_support": 0.2, "server.listen": "0.0.0.0:1", "server.behind_proxy": True},
    )
    assert fingerprint(same) == fingerprint(base)
    for key, value in [
        ("engine.epsilon", 0.002),
        ("engine.max_itemset_size", 2),
        ("engine.window_size", 100000),
        ("engine.pane_size", 10000),
        ("input.format", "csv"),
    ]:
        assert fingerprint(apply_overrides(base, {key: value})) != fingerprint(base), key
    timed = apply_overrides(base, {"engine.window_seconds": 60, "engine.pane_seconds": 10})
    assert fingerprint(timed) != fingerprint(base)


def test_describe_mentions_the_derived_error_bound() -> None:
    text = describe(Config())
    # 10 panes of 5000 with bucket width ceil(1/0.001) = 1000: sum of ceil(5000/1000) = 50
    assert "max undercount 50" in text
    assert "\n" not in text
    assert "exact counts" in describe(apply_overrides(Config(), {"engine.epsilon": 0}))


def test_parse_listen() -> None:
    assert parse_listen("0.0.0.0:0") == ("0.0.0.0", 0)
    assert parse_listen(f"[::1]:{DEFAULT_PORT}") == ("::1", DEFAULT_PORT)
    assert parse_listen(DEFAULT_LISTEN) == ("127.0.0.1", DEFAULT_PORT)
    for bad in (str(DEFAULT_PORT), f":{DEFAULT_PORT}", "host:", "::1:80", "h:99999"):
        with pytest.raises(ValueError, match=r"host:port|IPv6"):
            parse_listen(bad)


def test_csv_column_numbers_are_only_required_for_csv() -> None:
    # header: false needs column numbers only where the CSV decoder is used
    csv = {"header": False}
    assert config_from_mapping({"input": {"format": "basket", "csv": csv}}).input.csv == (
        dataclasses.replace(Config().input.csv, header=False)
    )
    numbers = {"header": False, "order_field": "2", "item_field": "0", "ts_field": "1"}
    cfg = config_from_mapping({"input": {"format": "csv", "csv": numbers}})
    assert (cfg.input.csv.header, cfg.input.csv.order_field) == (False, "2")


def test_check_config_main(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    good = _write(tmp_path, "engine:\n  epsilon: 0.01\n", "good.yaml")
    assert check_config_main(good) == 0
    out = capsys.readouterr()
    assert out.out.startswith("OK: ")
    assert "epsilon 0.01" in out.out
    bad = _write(tmp_path, "rules:\n  min_lift: -2\n", "bad.yaml")
    assert check_config_main(bad) == 2
    out = capsys.readouterr()
    assert out.out == ""
    assert "rules.min_lift = -2" in out.err
    assert out.err.count("\n") == 1


def test_engine_section_fields_are_all_validated() -> None:
    # every engine key has a rule in the table (a key without any rule is easy to forget)
    from streamcount.config.checks import KEY_RULES

    for f in dataclasses.fields(EngineConfig):
        assert f"engine.{f.name}" in KEY_RULES, f.name
