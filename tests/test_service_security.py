"""``streamcount run`` as a real subprocess, exposed the careful way: /metrics behind the token
and its public view, the token rotated on SIGHUP, failed authentications on /metrics, HTTPS,
and dead letters lost on a full device counted in the metrics.
"""

from __future__ import annotations

import json
import os
import signal
import ssl
from pathlib import Path

import pytest
from service_helpers import ServiceRunner, parse_metrics, shop_baskets, wait_until
from test_server_hardening import make_certificate

from streamcount.service.metrics import ITEM_TEXT_METRICS

TOKEN_ENV = "STREAMCOUNT_TEST_TOKEN"
NDJSON = {"Content-Type": "application/x-ndjson"}

#: exact counts, rules without statistics or hysteresis, so planted items give rules at once
CONFIG = {
    "input": {"source": "http", "format": "jsonl"},
    "engine": {"epsilon": 0.0, "window_size": 200, "pane_size": 50, "batch_size": 1},
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


def _bearer(token: str) -> dict[str, str]:
    return {"Authorization": f"Bearer {token}"}


def _post_baskets(service, auth: dict[str, str], n: int = 120) -> None:  # type: ignore[no-untyped-def]
    body = b"".join(
        json.dumps({"id": i, "items": b}).encode() + b"\n"
        for i, b in enumerate(shop_baskets(n, seed=11))
    )
    answer = service.request("POST", "/v1/transactions", body, {**auth, **NDJSON})
    assert answer.status == 202, answer.body


def test_public_metrics_never_carry_item_names(services: ServiceRunner) -> None:
    token = "oat-loaf-and-plum-jam-7d1e"
    service = services.start(
        {**CONFIG, "server": {"token_env": TOKEN_ENV, "public_metrics": True}},
        env={TOKEN_ENV: token},
    )
    auth = _bearer(token)
    _post_baskets(service, auth)
    service.wait_status(lambda s: s["active_rules"] > 0, "active rules", headers=auth)
    full = service.request("GET", "/metrics", headers=auth)
    assert full.status == 200
    assert 'streamcount_rule_lift{antecedent="' in full.body.decode()
    public = service.request("GET", "/metrics")
    assert public.status == 200
    text = public.body.decode()
    for name in ITEM_TEXT_METRICS:
        assert name not in text
    assert "loose-tea" not in text and "scone" not in text  # the planted items
    assert set(parse_metrics(text)) < set(parse_metrics(full.body.decode()))
    assert service.request("GET", "/v1/rules").status == 401
    assert service.stop() == 0


def test_token_rotation_on_sighup_and_failed_authentications(
    services: ServiceRunner, tmp_path: Path
) -> None:
    token_file = tmp_path / "api-token"
    token_file.write_text("first-token-a1b2c3d4e5f6\n", encoding="utf-8")
    os.chmod(token_file, 0o600)
    service = services.start(
        {**CONFIG, "server": {"token_file": str(token_file), "auth_failures_per_minute": 5}}
    )
    first, second = _bearer("first-token-a1b2c3d4e5f6"), _bearer("second-token-f6e5d4c3b2a1")
    assert service.request("GET", "/metrics").status == 401
    assert service.request("GET", "/metrics", headers=second).status == 401
    assert service.request("GET", "/v1/status", headers=first).status == 200

    token_file.write_text("second-token-f6e5d4c3b2a1\n", encoding="utf-8")
    service.proc.send_signal(signal.SIGHUP)
    service.wait_log(r"API token reloaded from")
    wait_until(
        lambda: service.request("GET", "/v1/status", headers=second).status == 200,
        "the new token to be accepted",
    )
    assert service.request("GET", "/v1/status", headers=first).status == 401
    assert service.proc.poll() is None  # SIGHUP did not stop the service

    # an empty file is not taken: the token in force stays, and the log says so
    token_file.write_text("", encoding="utf-8")
    service.proc.send_signal(signal.SIGHUP)
    service.wait_log(r"API token not reloaded")
    assert service.request("GET", "/v1/status", headers=second).status == 200

    metrics = service.metrics(second)
    # 401s so far: /metrics without and with the unknown token, then the old token once
    assert metrics[("streamcount_auth_failures_total", ())] == 3
    assert metrics[("streamcount_http_refused_total", (("reason", "rate_limited"),))] == 0
    assert service.stop() == 0


def test_https_service(services: ServiceRunner, tmp_path: Path) -> None:
    cert, key = make_certificate(tmp_path)
    service = services.start(
        {**CONFIG, "server": {"tls_certificate": str(cert), "tls_key": str(key)}}, wait=False
    )
    port = int(service.wait_log(r"listening on https://127\.0\.0\.1:(\d+)").group(1))
    import http.client

    context = ssl.create_default_context(cafile=str(cert))
    conn = http.client.HTTPSConnection("127.0.0.1", port, timeout=10, context=context)
    conn.request("GET", "/healthz")
    answer = conn.getresponse()
    assert answer.status == 200
    assert answer.getheader("X-Frame-Options") == "DENY"
    conn.close()
    assert service.stop() == 0


@pytest.mark.skipif(not os.path.exists("/dev/full"), reason="needs /dev/full (Linux)")
def test_dead_letters_lost_on_a_full_device_are_counted(
    services: ServiceRunner, tmp_path: Path
) -> None:
    feed = tmp_path / "orders.txt"
    good = [" ".join(b) for b in shop_baskets(30, seed=2)]
    bad = [f"tea jam\x00{i}" for i in range(25)]  # control characters: set aside
    feed.write_text("\n".join(good + bad) + "\n", encoding="utf-8")
    service = services.start(
        {
            "input": {"path": str(feed), "dead_letter_path": "/dev/full"},
            "engine": {"epsilon": 0.0, "window_size": 100, "pane_size": 50},
        },
        wait=False,
    )
    service.wait_log(r"25 records lost so far")
    assert "dead-letter /dev/full" in service.stderr()
    assert "input.dead_letter_path" in service.stderr()
    service.wait_listening()
    metrics = wait_until(
        lambda: (m := service.metrics())[("streamcount_dead_letters_lost_total", ())] == 25 and m,
        "25 lost dead letters in the metrics",
        details=service.describe,
    )
    assert metrics[("streamcount_records_rejected_total", (("reason", "control_chars"),))] == 25
    assert metrics[("streamcount_transactions_total", ())] == 30
    assert service.stop() == 0
