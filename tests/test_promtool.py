"""Prometheus' own checker (promtool, Debian package ``prometheus``) on what we ship.

* ``promtool check metrics`` on a real scrape: a ``streamcount run`` subprocess counts a small
  generated JSON lines feed (timestamps, so the lag gauge exists) with ``metrics.top_rules``
  > 0 and enough planted co-purchases that rules, hence the per-rule gauges, exist; /metrics
  is fetched over HTTP and piped to promtool, which must exit 0 and print nothing (no lint
  problem either).
* ``promtool check rules`` (every lint on, lint fatal) on ``examples/alerting-rules.yml``,
  ``promtool check config`` on ``examples/prometheus.yml`` (which loads those rules), and
  ``promtool test rules`` on ``tests/promtool/*.yml``: unit tests of each alert on synthetic
  series, its annotations included.

promtool is found through :func:`tools.require_tool`: skipped by hand when missing (install
with ``make tools``), a failure under ``CI=true``.
"""

from __future__ import annotations

import json
import subprocess
import time
from pathlib import Path

import pytest
from service_helpers import ServiceRunner, shop_baskets
from tools import require_tool

from streamcount.service.metrics import METRIC_NAMES

REPO = Path(__file__).resolve().parent.parent
EXAMPLES = REPO / "examples"
PROMTOOL_TESTS = sorted((Path(__file__).resolve().parent / "promtool").glob("*.yml"))

#: exact counts over a time-based window of 4 panes of 30 s (event time, so the lag gauge
#: exists), rules without statistics or hysteresis so the planted items give active rules as
#: soon as a pane closes
CONFIG = {
    "input": {"format": "jsonl", "poll_interval_seconds": 0.05},
    "engine": {"epsilon": 0.0, "window_seconds": 120, "pane_seconds": 30, "batch_size": 10},
    "rules": {
        "min_support": 0.05,
        "min_confidence": 0.5,
        "min_lift": 1.2,
        "min_count": 1,
        "max_p_value": None,
        "conservative": False,
        "exit_ratio": 1.0,
    },
    "alerts": {"surge": False},
    "metrics": {"top_rules": 5},
}


def _promtool(*args: str, stdin: bytes | None = None) -> subprocess.CompletedProcess[bytes]:
    return subprocess.run(
        [require_tool("promtool"), *args],
        input=stdin,
        capture_output=True,
        timeout=60,
        check=False,
    )


def _describe(proc: subprocess.CompletedProcess[bytes]) -> str:
    return (
        f"promtool exited {proc.returncode}\nstdout:\n{proc.stdout.decode(errors='replace')}"
        f"\nstderr:\n{proc.stderr.decode(errors='replace')}"
    )


@pytest.mark.requires_tool("promtool")
def test_scrape_passes_promtool_check_metrics(services: ServiceRunner, tmp_path: Path) -> None:
    baskets = shop_baskets(120, seed=5)
    start = time.time() - len(baskets)  # one order a second up to now: a small, real lag
    feed = tmp_path / "orders.jsonl"
    feed.write_text(
        "".join(
            json.dumps({"id": f"q-{n}", "ts": start + n, "items": basket}) + "\n"
            for n, basket in enumerate(baskets)
        ),
        encoding="utf-8",
    )
    service = services.start({**CONFIG, "input": {**CONFIG["input"], "path": str(feed)}})
    service.wait_status(
        lambda s: s["transactions_seen"] == len(baskets) and s["active_rules"] > 0,
        f"{len(baskets)} transactions counted and active rules",
    )

    scrape = service.request("GET", "/metrics")
    assert scrape.status == 200, scrape
    text = scrape.body.decode("utf-8")
    # everything we expose is in this scrape, so promtool lints all of it
    families = {line.split()[2] for line in text.splitlines() if line.startswith("# TYPE ")}
    assert families >= set(METRIC_NAMES), set(METRIC_NAMES) - families
    assert 'streamcount_rule_lift{antecedent="' in text
    assert "\nstreamcount_event_lag_seconds " in text

    proc = _promtool("check", "metrics", stdin=scrape.body)
    assert proc.returncode == 0, _describe(proc)
    assert proc.stdout.strip() == b"" and proc.stderr.strip() == b"", _describe(proc)
    assert service.stop() == 0


@pytest.mark.requires_tool("promtool")
def test_alerting_rules_pass_promtool_check_rules() -> None:
    proc = _promtool(
        "check", "rules", "--lint=all", "--lint-fatal", str(EXAMPLES / "alerting-rules.yml")
    )
    assert proc.returncode == 0, _describe(proc)
    assert b"SUCCESS: 6 rules found" in proc.stdout, _describe(proc)


@pytest.mark.requires_tool("promtool")
def test_scrape_config_passes_promtool_check_config(tmp_path: Path) -> None:
    # loads alerting-rules.yml through rule_files and the bearer token from credentials_file,
    # both relative to the config; no token ships with the examples, so the check runs on a
    # copy with one made here (promtool refuses a credentials_file that does not exist)
    import secrets
    import shutil

    for name in ("prometheus.yml", "alerting-rules.yml"):
        shutil.copy(EXAMPLES / name, tmp_path / name)
    config = (tmp_path / "prometheus.yml").read_text(encoding="utf-8")
    assert "credentials_file: streamcount-token" in config
    (tmp_path / "streamcount-token").write_text(secrets.token_hex(32) + "\n", encoding="utf-8")
    proc = _promtool("check", "config", str(tmp_path / "prometheus.yml"))
    assert proc.returncode == 0, _describe(proc)
    assert b"SUCCESS" in proc.stdout, _describe(proc)
    (tmp_path / "streamcount-token").unlink()
    assert _promtool("check", "config", str(tmp_path / "prometheus.yml")).returncode != 0


def test_every_alert_has_a_promtool_unit_test() -> None:
    import yaml

    rules = yaml.safe_load((EXAMPLES / "alerting-rules.yml").read_text(encoding="utf-8"))
    alerts = {r["alert"] for g in rules["groups"] for r in g["rules"]}
    tested = set()
    for path in PROMTOOL_TESTS:
        spec = yaml.safe_load(path.read_text(encoding="utf-8"))
        for case in spec["tests"]:
            for check in case.get("alert_rule_test", []):
                if check.get("exp_alerts"):
                    tested.add(check["alertname"])
    assert alerts == tested, alerts ^ tested


@pytest.mark.requires_tool("promtool")
@pytest.mark.parametrize("path", PROMTOOL_TESTS, ids=[p.name for p in PROMTOOL_TESTS])
def test_promtool_rule_unit_tests(path: Path) -> None:
    proc = _promtool("test", "rules", str(path))
    assert proc.returncode == 0, _describe(proc)
