"""The README stays true: its two commands work, and its references name every config key and
every metric that exists."""

from __future__ import annotations

import dataclasses
import re
import subprocess
import sys
from pathlib import Path

from streamcount.config.settings import Config
from streamcount.service.metrics import METRIC_NAMES

ROOT = Path(__file__).resolve().parents[1]
README = (ROOT / "README.md").read_text(encoding="utf-8")


def _config_keys(cls: type = Config, prefix: str = "") -> list[str]:
    keys = []
    for f in dataclasses.fields(cls):
        default = f.default_factory() if f.default_factory is not dataclasses.MISSING else None
        if dataclasses.is_dataclass(default):
            keys += _config_keys(type(default), f"{prefix}{f.name}.")
        else:
            keys.append(f"{prefix}{f.name}")
    return keys


def _quick_start_commands() -> list[str]:
    section = README.split("## Quick start", 1)[1].split("\n## ", 1)[0]
    block = re.search(r"```sh\n(.*?)```", section, re.S)
    assert block is not None, "Quick start has no sh block"
    return [ln.split("#")[0].strip() for ln in block.group(1).splitlines() if ln.strip()]


def test_readme_names_every_config_key() -> None:
    keys = _config_keys()
    assert len(keys) > 50
    missing = [k for k in keys if f"`{k}`" not in README]
    assert not missing, f"README configuration reference lacks {missing}"


def test_readme_names_every_metric() -> None:
    missing = [m for m in METRIC_NAMES if f"`{m}`" not in README]
    assert not missing, f"README metrics reference lacks {missing}"


def test_quick_start_is_two_commands_and_ci_runs_the_test_one() -> None:
    assert _quick_start_commands() == ["make demo", "make test"]
    ci = (ROOT / ".ci" / "run").read_text(encoding="utf-8")
    assert re.search(r"^make test$", ci, re.M)
    makefile = (ROOT / "Makefile").read_text(encoding="utf-8")
    demo = makefile.split("\ndemo:", 1)[1].split("\n\n", 1)[0]
    test = makefile.split("\ntest:", 1)[1].split("\n\n", 1)[0]
    assert "streamcount demo" in demo
    assert "pytest" in test and "-m" not in test.split("pytest", 1)[1].split("\n")[0], (
        "make test must run the whole suite, slow tests included"
    )
    # both targets set up their own environment from the project's own files: the demo with
    # the runtime dependencies only, the tests with the test extra on top
    assert "$(RUNTIME)" in demo and "$(STAMP)" not in demo and "$(STAMP)" in test
    runtime = makefile.split("\n$(RUNTIME):", 1)[1].split("\n\n", 1)[0]
    assert "pip install --quiet -e .\n" in runtime + "\n" and "[test]" not in runtime
    assert "pip install" in makefile and ".[test]" in makefile


def test_demo_entry_point_runs() -> None:
    # the entry point behind `make demo` (the venv set-up is the Makefile's; not repeated here)
    proc = subprocess.run(
        [sys.executable, "-m", "streamcount", "demo", "--rate", "0"],
        capture_output=True,
        text=True,
        timeout=240,
        check=False,
    )
    assert proc.returncode == 0, proc.stderr
    assert "Alerts:" in proc.stdout


def test_test_entry_point_collects_the_suite() -> None:
    # the entry point behind `make test`: pytest finds the whole suite (no "no tests" exit 5)
    proc = subprocess.run(
        [sys.executable, "-m", "pytest", "--collect-only", "-q", str(ROOT / "tests")],
        capture_output=True,
        text=True,
        timeout=240,
        check=False,
        cwd=ROOT,
    )
    assert proc.returncode == 0, proc.stdout[-2000:] + proc.stderr[-2000:]
    collected = re.search(r"(\d+) tests? collected", proc.stdout)
    assert collected is not None and int(collected.group(1)) > 200


def test_default_yaml_matches_readme_defaults() -> None:
    # every key row of the README table shows the value config/default.yaml has
    import yaml

    data = yaml.safe_load((ROOT / "config" / "default.yaml").read_text(encoding="utf-8"))
    for key in _config_keys():
        value: object = data
        for part in key.split("."):
            assert isinstance(value, dict)
            value = value[part]
        shown = re.search(rf"^\| `{re.escape(key)}` \| `([^`]*)` \|", README, re.M)
        assert shown is not None, key
        assert yaml.safe_load(shown.group(1)) == value, key


def test_dead_letter_raw_cap_is_documented_as_the_code_has_it() -> None:
    from streamcount.intake.deadletter import RAW_CHARS
    from streamcount.intake.formats.text import too_long_detail

    assert f"{RAW_CHARS:,} characters" in README
    assert f"first {RAW_CHARS} characters" in too_long_detail("70000 bytes", 65536)
