"""End to end: ``streamcount run`` as a real subprocess, checked over real HTTP.

The reference for every count is a brute-force recount (``tests/oracle.py``: every k-subset of
every transaction counted with :mod:`itertools`) of the transactions the window says it holds;
with ``epsilon = 0`` the service must match it exactly. Rules are recomputed from those exact
counts with the textbook definitions (Agrawal, Imieliński & Swami 1993): support = c(Z)/N,
confidence = c(Z)/c(X), lift = confidence / (c(Y)/N).
"""

from __future__ import annotations

import json
from collections import Counter
from itertools import combinations
from pathlib import Path

import pytest
from oracle import exact_counts, exact_window_counts
from service_helpers import ServiceRunner, append_bytes, basket_lines, shop_baskets

from streamcount.service.metrics import REJECT_REASONS

TOKEN_ENV = "STREAMCOUNT_E2E_TOKEN"

#: exact counting, a window of 4 panes of 50 transactions, counted in batches of 10
ENGINE = {
    "epsilon": 0.0,
    "window_size": 200,
    "pane_size": 50,
    "batch_size": 10,
    "max_itemset_size": 3,
    "max_basket_items": 12,
}
#: rules without statistics or hysteresis, so the active set is exactly what passes the
#: thresholds at the last pane close
RULES = {
    "min_support": 0.05,
    "min_confidence": 0.5,
    "min_lift": 1.2,
    "min_count": 1,
    "max_p_value": None,
    "conservative": False,
    "exit_ratio": 1.0,
    "max_rules": 1000,
    "max_consequent_size": 1,
}


def _itemset_table(payload: dict) -> dict[tuple[str, ...], tuple[int, int]]:
    return {tuple(s["items"]): (s["count"], s["upper"]) for s in payload["itemsets"]}


def _exact_frequent(counts: Counter, n: int, min_support: float) -> dict:
    return {k: (c, c) for k, c in counts.items() if c >= min_support * n}


def _exact_rules(counts: Counter, n: int) -> dict[tuple[tuple[str, ...], tuple[str, ...]], dict]:
    """Every rule X => y (one consequent item) passing RULES on exact counts."""
    out = {}
    for z, cz in counts.items():
        if len(z) < 2 or cz < RULES["min_count"] or cz < RULES["min_support"] * n:
            continue
        for y in z:
            x = tuple(i for i in z if i != y)
            conf = cz / counts[x]
            lift = conf / (counts[(y,)] / n)
            for value, threshold in ((conf, RULES["min_confidence"]), (lift, RULES["min_lift"])):
                # the data must not sit on a threshold, or float rounding would decide
                assert abs(value - threshold) > 1e-6, (x, y, value, threshold)
            if conf >= RULES["min_confidence"] and lift >= RULES["min_lift"]:
                out[(x, (y,))] = {
                    "joint": cz,
                    "antecedent": counts[x],
                    "consequent": counts[(y,)],
                    "support": cz / n,
                    "confidence": conf,
                    "lift": lift,
                }
    return out


def _distinct_per_pane(accepted: list[list[str]], panes: range, size: int) -> int:
    """Distinct itemsets of ``size`` summed over count-based panes of 50 (tracked entries
    of an exact summary)."""
    total = 0
    for p in panes:
        seen = set()
        for basket in accepted[p * 50 : (p + 1) * 50]:
            seen.update(combinations(sorted(set(basket)), size))
        total += len(seen)
    return total


def test_followed_file_counts_metrics_itemsets_and_rules(
    services: ServiceRunner, tmp_path: Path
) -> None:
    feed = tmp_path / "orders.txt"
    feed.write_bytes(b"")
    accepted = shop_baskets(300, seed=11)
    service = services.start(
        {
            "input": {
                "path": str(feed),
                "max_record_bytes": 2000,
                "poll_interval_seconds": 0.05,
            },
            "engine": ENGINE,
            "rules": RULES,
            "alerts": {"surge": False},
        }
    )
    bad = {
        "too_many_items": [" ".join(f"extra-{i}" for i in range(13)).encode()],
        "too_long": [b"loose-tea " * 300],
        "bad_encoding": [b"scone \xff\xfe plum-jam", b"\xc3\x28 oat-loaf"],
    }

    # phase 1: 100 baskets, then 30 more with bad lines among them, appended a moment later
    append_bytes(feed, basket_lines(accepted[:100]))
    service.wait_counted(100)
    append_bytes(
        feed,
        basket_lines(accepted[100:110])
        + bad["too_many_items"][0]
        + b"\n"
        + basket_lines(accepted[110:120])
        + bad["too_long"][0]
        + b"\n"
        + bad["bad_encoding"][0]
        + b"\n"
        + basket_lines(accepted[120:130]),
    )
    status = service.wait_counted(130)
    # the window holds all 130: 3 panes of a 4-pane window (the newest one still open)
    assert (status["window"]["first_seq"], status["window"]["last_seq"]) == (1, 130)
    exact = exact_window_counts(accepted, 1, 130, 3)
    got = service.get_json("/v1/itemsets?min_support=0.05&limit=10000")
    assert got["window"]["transactions"] == 130
    assert _itemset_table(got) == _exact_frequent(exact, 130, 0.05)

    # phase 2: up to 300 accepted transactions, which closes pane 5 (seq 251..300)
    append_bytes(feed, basket_lines(accepted[130:200]) + bad["bad_encoding"][1] + b"\n")
    append_bytes(feed, basket_lines(accepted[200:300]))
    status = service.wait_counted(300)
    # count-based window of 200/50 = 4 panes: panes 2..5 = seq 101..300
    window = status["window"]
    assert (window["first_seq"], window["last_seq"], window["transactions"]) == (101, 300, 200)
    assert window["max_error"] == 0
    exact = exact_window_counts(accepted, 101, 300, 3)

    # /v1/itemsets: exactly the itemsets whose exact count reaches 5 % of 200
    got = service.get_json("/v1/itemsets?min_support=0.05&limit=10000")
    assert got["window"] == window
    assert _itemset_table(got) == _exact_frequent(exact, 200, 0.05)
    sized = service.get_json("/v1/itemsets?min_support=0.05&size=2&limit=10000")
    assert _itemset_table(sized) == {
        k: v for k, v in _exact_frequent(exact, 200, 0.05).items() if len(k) == 2
    }

    # /v1/rules: evaluated at the close of pane 5, whose window is the current one
    want = _exact_rules(exact, 200)
    assert want, "the planted items must give rules"
    rules = service.get_json("/v1/rules?limit=10000")["rules"]
    got_rules = {(tuple(r["antecedent"]), tuple(r["consequent"])): r for r in rules}
    assert set(got_rules) == set(want)
    for key, rule in got_rules.items():
        ref = want[key]
        assert rule["transactions"] == 200
        for part in ("joint", "antecedent", "consequent"):
            assert rule["counts"][part] == {"low": ref[part], "high": ref[part]}, (key, part)
        for name in ("support", "confidence", "lift"):
            assert rule["measures"][name]["value"] == pytest.approx(ref[name], rel=1e-12)
    lifts = [r["measures"]["lift"]["value"] for r in rules]
    assert lifts == sorted(lifts, reverse=True)

    # /metrics over HTTP, parsed with prometheus-client's text parser
    metrics = service.metrics()
    assert metrics[("streamcount_transactions_total", ())] == 300
    assert metrics[("streamcount_window_transactions", ())] == 200
    assert metrics[("streamcount_window_max_error", ())] == 0
    assert metrics[("streamcount_live_panes", ())] == 4
    # the process collector: the resident memory the README's memory section speaks of
    assert metrics[("process_resident_memory_bytes", ())] > 10 * 2**20
    assert metrics[("streamcount_buffered_transactions", ())] == 0
    assert metrics[("streamcount_vocabulary_items", ())] == len({i for b in accepted for i in b})
    for size in (1, 2, 3):
        # panes 0 and 1 left the window when pane 5 was counted
        want_entries = _distinct_per_pane(accepted, range(2, 6), size)
        assert metrics[("streamcount_tracked_itemsets", (("size", str(size)),))] == want_entries
        assert status["tracked_itemsets"][str(size)] == want_entries
    for reason in REJECT_REASONS:
        value = metrics[("streamcount_records_rejected_total", (("reason", reason),))]
        assert value == len(bad.get(reason, [])), reason

    # the dead-letter file holds each bad line with its reason and byte offset
    content = feed.read_bytes()
    letters = [
        json.loads(line)
        for line in (tmp_path / "dead-letter.jsonl").read_text(encoding="utf-8").splitlines()
    ]
    assert Counter(d["reason"] for d in letters) == {k: len(v) for k, v in bad.items()}
    for d in letters:
        start = d["offset"]
        line = content[start : content.index(b"\n", start)]
        assert line in bad[d["reason"]], d

    assert service.stop() == 0


NDJSON = {"Content-Type": "application/x-ndjson"}


def _bearer(token: str) -> dict[str, str]:
    return {"Authorization": f"Bearer {token}"}


def test_http_token_limits_errors_and_ingest(services: ServiceRunner, tmp_path: Path) -> None:
    token = "tea-and-scones-9f3c"
    service = services.start(
        {
            "input": {
                "source": "http",
                "format": "jsonl",
                "max_body_bytes": 3000,
            },
            "engine": {**ENGINE, "batch_size": 1},
            "rules": RULES,
            "server": {"token_env": TOKEN_ENV, "max_request_bytes": 4000},
        },
        env={TOKEN_ENV: token},
    )
    auth = _bearer(token)

    # the token is enforced on the API and /metrics (its per-rule gauges name items), not on
    # the probes
    for path in ("/v1/status", "/metrics"):
        for headers in ({}, _bearer("wrong-token"), {"Authorization": token}):
            denied = service.request("GET", path, headers=headers)
            assert denied.status == 401, (path, headers)
            assert denied.json()["error"]["code"] == "unauthorized"
            assert denied.headers["www-authenticate"].startswith("Bearer")
    assert service.request("GET", "/v1/status", headers=auth).status == 200
    assert service.request("GET", "/metrics", headers=auth).status == 200
    assert service.request("GET", "/healthz").status == 200
    assert service.request("GET", "/readyz").status == 200
    post = service.request("POST", "/v1/transactions", b'{"items": ["tea"]}\n', NDJSON)
    assert post.status == 401

    # unknown path: 404 as JSON; wrong method: 405 with Allow
    missing = service.request("GET", "/v1/nothing-here", headers=auth)
    assert missing.status == 404
    assert missing.headers["content-type"] == "application/json"
    assert missing.json()["error"]["code"] == "not_found"
    wrong = service.request("GET", "/v1/transactions", headers=auth)
    assert (wrong.status, wrong.headers["allow"]) == (405, "POST")

    # a body over server.max_request_bytes (4000) is refused before it is read
    big = b"".join(b'{"items": ["oat-loaf", "plum-jam"]}\n' for _ in range(300))
    assert len(big) > 4000
    too_large = service.request(
        "POST", "/v1/transactions", big, {**auth, "Content-Type": "application/x-ndjson"}
    )
    assert too_large.status == 413
    assert too_large.json()["error"]["code"] == "too_large"
    # so is one over input.max_body_bytes (3000), the smaller limit for ingest
    over_ingest_limit = big[:3500]
    too_large = service.request("POST", "/v1/transactions", over_ingest_limit, {**auth, **NDJSON})
    assert too_large.status == 413
    # a body of another type is refused before the loop sees it
    form = service.request(
        "POST",
        "/v1/transactions",
        b"items=tea",
        {**auth, "Content-Type": "application/x-www-form-urlencoded"},
    )
    assert form.status == 415
    assert form.json()["error"]["code"] == "unsupported_media_type"

    # NDJSON ingest: good lines counted, a bad one reported, dead-lettered and counted
    baskets = shop_baskets(20, seed=5)
    body = b"".join(
        json.dumps({"id": i, "items": b}).encode() + b"\n" for i, b in enumerate(baskets)
    )
    body += b'{"id": 99, "items": "not-a-list"}\n'
    assert len(body) <= 3000
    accepted = service.request(
        "POST", "/v1/transactions", body, {**auth, "Content-Type": "application/x-ndjson"}
    )
    assert accepted.status == 202, accepted.body
    result = accepted.json()
    assert result["accepted"] == 20
    assert [(e["line"], e["reason"]) for e in result["rejected"]] == [(21, "wrong_type")]
    service.wait_status(
        lambda s: s["transactions_seen"] == 20 and s["window"]["last_seq"] == 20,
        "20 ingested transactions counted",
        headers=auth,
    )
    got = service.get_json("/v1/itemsets?min_support=0.05&limit=10000", headers=auth)
    assert _itemset_table(got) == _exact_frequent(exact_counts(baskets, 3), 20, 0.05)
    metrics = service.metrics(auth)
    assert metrics[("streamcount_transactions_total", ())] == 20
    assert metrics[("streamcount_records_rejected_total", (("reason", "wrong_type"),))] == 1
    letters = (tmp_path / "dead-letter.jsonl").read_text(encoding="utf-8").splitlines()
    assert [(json.loads(d)["reason"], json.loads(d)["source"]) for d in letters] == [
        ("wrong_type", "http")
    ]

    # a body with no valid transaction at all is a 400 naming the reason
    empty = service.request("POST", "/v1/transactions", b'{"id": 1}\n', {**auth, **NDJSON})
    assert empty.status == 400
    assert "missing_field" in empty.json()["error"]["message"]

    assert service.stop() == 0


def test_token_env_not_set_refuses_to_start(services: ServiceRunner) -> None:
    service = services.start(
        {"input": {"source": "http"}, "server": {"token_env": TOKEN_ENV}},
        env={TOKEN_ENV: ""},
        wait=False,
    )
    assert service.wait_exit() == 2
    lines = service.stderr().strip().splitlines()
    assert len(lines) == 1, lines
    assert "server.token_env" in lines[0] and TOKEN_ENV in lines[0]


#: (config file text, the dotted key the one-line error must name)
BAD_CONFIGS = [
    ("engine:\n  epsilon: 1.5\n", "engine.epsilon"),
    ("engine:\n  window_size: 100\n  pane_size: 30\n", "engine.window_size"),
    ("engine:\n  epsilom: 0.01\n", "engine.epsilom"),
    ("input:\n  format: xml\n", "input.format"),
    ("server:\n  listen: no-port-here\n", "server.listen"),
    ("rules:\n  min_support: high\n", "rules.min_support"),
]


@pytest.mark.parametrize(("text", "key"), BAD_CONFIGS, ids=[k for _, k in BAD_CONFIGS])
def test_bad_config_exits_2_with_one_line(
    services: ServiceRunner, tmp_path: Path, text: str, key: str
) -> None:
    path = tmp_path / "bad.yaml"
    path.write_text(text, encoding="utf-8")
    (tmp_path / "feed.txt").write_text("tea scone\n", encoding="ascii")
    for args in (
        ("check-config", str(path)),
        ("run", "--config", str(path), "--input", "feed.txt", "--no-follow"),
    ):
        done = services.run_cli(*args)
        assert done.returncode == 2, (args, done.stdout, done.stderr)
        lines = done.stderr.strip().splitlines()
        assert len(lines) == 1, (args, done.stderr)
        assert key in lines[0], (args, lines[0])
        assert done.stdout == ""
    assert not (tmp_path / "dead-letter.jsonl").exists()
