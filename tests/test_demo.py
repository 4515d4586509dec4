"""The demo, run as a user would (a real subprocess), in a short mode.

The planted patterns are defined in streamcount.demo (BUNDLE stops at order 9,000; PROMOTION
starts at order 7,000); the demo must show the promotion's alert after it starts and the
bundle's faded alert after it stops.
"""

from __future__ import annotations

import json
import subprocess
import sys

from streamcount.demo.run import BUNDLE, BUNDLE_STOP, PROMOTION, PROMOTION_START


def _run_demo(*extra: str) -> subprocess.CompletedProcess[str]:
    return subprocess.run(
        [sys.executable, "-m", "streamcount", "demo", *extra],
        capture_output=True,
        text=True,
        timeout=240,
        check=False,
    )


def test_demo_json_shows_the_planted_patterns() -> None:
    proc = _run_demo("--rate", "0", "--json")
    assert proc.returncode == 0, proc.stderr
    alerts = [json.loads(line) for line in proc.stdout.splitlines() if line.strip()]
    assert alerts, "the demo printed no alert record"
    promo = [a for a in alerts if set(a["items"]) == set(PROMOTION)]
    kinds = {a["kind"] for a in promo}
    assert {"surged", "emerged"} <= kinds, promo
    assert all(a["seq"] > PROMOTION_START for a in promo)
    faded = [a for a in alerts if a["kind"] == "faded" and set(a["items"]) == set(BUNDLE)]
    assert len(faded) == 1 and faded[0]["seq"] > BUNDLE_STOP
    # the bundle was part of the starting state: never alerted as emerged
    assert not [a for a in alerts if a["kind"] == "emerged" and set(a["items"]) == set(BUNDLE)]
    # the human-readable parts went to stderr, including the caution
    assert "/metrics" in proc.stderr
    assert "signals for a person to review" in proc.stderr


def test_demo_readable_output_in_short_paced_mode() -> None:
    proc = _run_demo("--duration", "6")
    assert proc.returncode == 0, proc.stderr
    out = proc.stdout
    assert "Quillbrook Provisions" in out
    assert "SURGED" in out and "bread-scoring-blade + sourdough-starter-jar" in out
    assert "FADED" in out and "chai-spice-mix => stoneware-mug" in out
    assert "Done: 16,000 orders" in out
