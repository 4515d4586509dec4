"""The external-tool rule (tests/tools.py) and ``make tools``, checked from the outside.

Each rule is checked by running pytest as a real subprocess on a tiny generated test file,
with ``PATH`` pointing at a temporary directory, and reading the outcome from its JUnit XML
report: a missing tool skips by hand and fails under ``CI=true``; a present tool's path is
returned. ``make tools`` is run as a subprocess too, where apt-get cannot be found.
"""

from __future__ import annotations

import os
import re
import shutil
import subprocess
import sys
import xml.etree.ElementTree as ET
from pathlib import Path

import pytest
import tools

TESTS_DIR = Path(__file__).resolve().parent
REPO = TESTS_DIR.parent

#: a program name no system has, and a package name for it
ABSENT = "streamcount-absent-tool"
ABSENT_PACKAGE = "streamcount-absent-package"

_GENERATED = f"""
import pytest
from tools import require_tool


def test_call():
    path = require_tool({ABSENT!r}, {ABSENT_PACKAGE!r})
    assert path  # not reached when the tool is missing


@pytest.mark.requires_tool({ABSENT!r}, {ABSENT_PACKAGE!r})
def test_marker():
    pass


def test_present():
    path = require_tool("fake-present-tool", "fake-package")
    print("FOUND", path)
    assert path.endswith("/fake-present-tool")
"""


def _run_generated(tmp_path: Path, *, ci: str | None) -> dict[str, tuple[str, str]]:
    """Run the generated tests in a pytest subprocess; ``{test name: (outcome, message)}``."""
    bindir = tmp_path / "bin"
    bindir.mkdir()
    fake = bindir / "fake-present-tool"
    fake.write_text("#!/bin/sh\nexit 0\n", encoding="utf-8")
    fake.chmod(0o755)
    (tmp_path / "test_generated.py").write_text(_GENERATED, encoding="utf-8")
    (tmp_path / "pytest.ini").write_text("[pytest]\n", encoding="utf-8")
    env = {k: v for k, v in os.environ.items() if k not in {"CI", "PYTHONPATH"}}
    env["PATH"] = str(bindir)
    env["PYTHONPATH"] = str(TESTS_DIR)
    if ci is not None:
        env["CI"] = ci
    report = tmp_path / "report.xml"
    proc = subprocess.run(
        [
            sys.executable,
            *("-m", "pytest", "-p", "tools", "-p", "no:cacheprovider", "--strict-markers"),
            *("-q", f"--junitxml={report}", "test_generated.py"),
        ],
        cwd=tmp_path,
        env=env,
        capture_output=True,
        text=True,
        timeout=120,
        check=False,
    )
    assert report.exists(), (proc.returncode, proc.stdout, proc.stderr)
    out: dict[str, tuple[str, str]] = {}
    for case in ET.parse(report).getroot().iter("testcase"):
        outcome, message = "passed", ""
        for child in case:
            if child.tag in {"skipped", "failure", "error"}:
                outcome, message = child.tag, child.get("message", "") + (child.text or "")
        out[case.get("name", "")] = (outcome, message)
    return out


def test_missing_tool_skips_by_hand_naming_package_and_make_tools(tmp_path: Path) -> None:
    got = _run_generated(tmp_path, ci=None)
    assert {name: outcome for name, (outcome, _) in got.items()} == {
        "test_call": "skipped",
        "test_marker": "skipped",
        "test_present": "passed",
    }
    for name in ("test_call", "test_marker"):
        message = got[name][1]
        assert ABSENT in message and ABSENT_PACKAGE in message and "make tools" in message


def test_missing_tool_fails_under_ci(tmp_path: Path) -> None:
    got = _run_generated(tmp_path, ci="true")
    # a marker acts in setup, so pytest reports it as an error; either way it does not pass
    assert got["test_call"][0] == "failure"
    assert got["test_marker"][0] == "error"
    assert got["test_present"][0] == "passed"
    for name in ("test_call", "test_marker"):
        assert "CI=true" in got[name][1] and ABSENT_PACKAGE in got[name][1]


def test_ci_other_than_true_is_by_hand(tmp_path: Path) -> None:
    got = _run_generated(tmp_path, ci="false")
    assert got["test_call"][0] == "skipped"


def test_find_tool_falls_back_to_sbin(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    sbin = tmp_path / "sbin"
    sbin.mkdir()
    daemon = sbin / "fake-daemon"
    daemon.write_text("#!/bin/sh\n", encoding="utf-8")
    daemon.chmod(0o755)
    monkeypatch.setenv("PATH", str(tmp_path / "empty"))
    assert tools.find_tool("fake-daemon") is None
    monkeypatch.setattr(tools, "_SBIN_DIRS", (str(sbin),))
    assert tools.find_tool("fake-daemon") == str(daemon)


def test_makefile_tools_match_the_table() -> None:
    text = (REPO / "Makefile").read_text(encoding="utf-8")
    match = re.search(r"^TOOLS\s*:=\s*(.+)$", text, re.MULTILINE)
    assert match, "Makefile has no TOOLS := line"
    pairs = dict(pair.split("=", 1) for pair in match.group(1).split())
    assert pairs == tools.TOOL_PACKAGES


def _make_tools(tmp_path: Path, tool_pairs: str) -> subprocess.CompletedProcess[str]:
    make = shutil.which("make")
    if make is None:
        pytest.skip("make not found")
    bindir = tmp_path / "bin"
    bindir.mkdir(exist_ok=True)
    for prog in ("id", "sh"):  # the recipe's own needs; no apt-get on this PATH
        found = shutil.which(prog)
        assert found, prog
        (bindir / prog).symlink_to(found)
    env = {"PATH": str(bindir), "HOME": str(tmp_path)}
    return subprocess.run(
        [make, "--no-print-directory", "-C", str(REPO), "tools", f"TOOLS={tool_pairs}"],
        env=env,
        capture_output=True,
        text=True,
        timeout=60,
        check=False,
    )


def test_make_tools_carries_on_without_apt(tmp_path: Path) -> None:
    assert shutil.which("apt-get", path=str(tmp_path / "bin")) is None
    proc = _make_tools(tmp_path, f"{ABSENT}={ABSENT_PACKAGE}")
    assert proc.returncode == 0, (proc.stdout, proc.stderr)
    assert f"missing Debian packages: {ABSENT_PACKAGE}" in proc.stdout


def test_make_tools_is_silent_when_everything_is_there(tmp_path: Path) -> None:
    bindir = tmp_path / "bin"
    bindir.mkdir()
    fake = bindir / "fake-present-tool"
    fake.write_text("#!/bin/sh\n", encoding="utf-8")
    fake.chmod(0o755)
    proc = _make_tools(tmp_path, "fake-present-tool=fake-package")
    assert proc.returncode == 0, (proc.stdout, proc.stderr)
    assert proc.stdout == "" and proc.stderr == ""
