"""What the page reads: its files and their headers, /v1/history, as_of on every answer,
incremental rules, and the history in the checkpoint. A real service runs in-process on the
demo shop's generated feed (with its planted changes); requests go through ``route()``, the
same function the listener calls (the browser tests drive a real listener)."""

from __future__ import annotations

import dataclasses
import re
from html.parser import HTMLParser
from typing import Any

import pytest
from generalised_oracle import catalogue_details

from streamcount.config.load import fingerprint_settings
from streamcount.config.settings import CheckpointConfig, PageConfig
from streamcount.demo.run import (
    PROMOTION,
    PacedFeedSource,
    demo_config,
    demo_feed,
    demo_orders,
)
from streamcount.demo.skus import write_catalogue
from streamcount.errors import CheckpointError
from streamcount.service.checkpoint import load_latest_checkpoint, save_checkpoint
from streamcount.service.loop import STATE_VERSION, Service
from streamcount.service.page import PAGE_FILES, page_file
from streamcount.service.server import Response, route

TOKEN = "page-test-token"
ORDERS = 11_000  # past the demo's promotion (order 7,000) and the bundle's stop (9,000)


def _service(tmp_path: Any = None, **changes: Any) -> Service:
    config = demo_config(None)
    if tmp_path is not None:
        config = dataclasses.replace(
            config, checkpoint=CheckpointConfig(checkpoint_dir=str(tmp_path / "ck"))
        )
    config = dataclasses.replace(config, **changes)
    return Service(config, sources=[PacedFeedSource(demo_feed(7, ORDERS).transactions(), 0)])


@pytest.fixture(scope="module")
def service() -> Service:
    svc = _service()
    svc.run(install_signals=False)
    return svc


def get(service: Service, path: str, token: str | None = None, **query: Any) -> Response:
    q = {k: v if isinstance(v, list) else [str(v)] for k, v in query.items()}
    headers = {"Authorization": f"Bearer {token}"} if token else {}
    return route("GET", path, q, headers, b"", service.api, token=TOKEN)


# -- the page's files ------------------------------------------------------------------------


class _Tags(HTMLParser):
    def __init__(self) -> None:
        super().__init__()
        self.tags: list[tuple[str, dict[str, str | None]]] = []
        self.inline_script = False

    def handle_starttag(self, tag: str, attrs: list[tuple[str, str | None]]) -> None:
        self.tags.append((tag, dict(attrs)))

    def handle_data(self, data: str) -> None:
        if self.tags and self.tags[-1][0] == "script" and data.strip():
            self.inline_script = True


def test_page_files_load_without_the_token_with_strict_headers(service: Service) -> None:
    for path in PAGE_FILES:
        res = get(service, path)
        assert res.status == 200, (path, res.body)
        h = res.headers
        csp = h["Content-Security-Policy"]
        for directive in (
            "default-src 'none'",
            "script-src 'self'",
            "style-src 'self'",
            "connect-src 'self'",
            "frame-ancestors 'none'",
            "require-trusted-types-for 'script'",
        ):
            assert directive in csp, (directive, csp)
        assert "unsafe" not in csp
        assert h["X-Content-Type-Options"] == "nosniff"
        assert h["X-Frame-Options"] == "DENY"
        assert "Set-Cookie" not in h
        assert h["Content-Type"] == PAGE_FILES[path][1]
    assert get(service, "/").body == page_file("/")[0]


def test_the_page_has_no_inline_code_and_no_outside_asset() -> None:
    html = page_file("/")[0].decode("utf-8")
    parser = _Tags()
    parser.feed(html)
    assert not parser.inline_script
    assert "<style" not in html
    for tag, attrs in parser.tags:
        assert "style" not in attrs, tag
        assert not [a for a in attrs if a.startswith("on")], (tag, attrs)
        for name in ("src", "href"):
            url = attrs.get(name)
            if url is not None:
                assert url.startswith(("/page/", "#")), (tag, url)
    script = page_file("/page/app.js")[0].decode("utf-8")
    for sink in ("innerHTML", "outerHTML", "insertAdjacentHTML", "document.write", "eval("):
        assert sink not in script, sink
    assert "document.cookie" not in script
    for name in ("/", "/page/app.js", "/page/style.css", "/page/icon.svg"):
        text = page_file(name)[0].decode("utf-8")
        # the only absolute URL is the SVG namespace name, which is never fetched
        urls = set(re.findall(r"[a-z]+://[^\s\"'`)]+", text))
        assert urls <= {"http://www.w3.org/2000/svg"}, (name, urls)


def test_the_page_can_be_switched_off() -> None:
    svc = _service(page=PageConfig(enabled=False))
    try:
        assert route("GET", "/", {}, {}, b"", svc.api).status == 404
        assert route("GET", "/v1/status", {}, {}, b"", svc.api).status == 200
    finally:
        svc.shutdown()


# -- the API answers the page reads ------------------------------------------------------------


def test_every_answer_of_one_view_carries_the_same_as_of(service: Service) -> None:
    view = service.api.view
    expected = {"pane_close": service.pipeline.closes, "last_seq": view.window.last_seq}
    assert expected["pane_close"] == ORDERS // 500  # one evaluated close per pane of 500
    answers = [
        get(service, "/v1/status", TOKEN),
        get(service, "/v1/rules", TOKEN),
        get(service, "/v1/alerts", TOKEN),
        get(service, "/v1/itemsets", TOKEN),
        get(service, "/v1/history", TOKEN, items=list(PROMOTION)),
    ]
    for res in answers:
        assert res.status == 200, res.body
        assert res.json()["as_of"] == expected


def test_protected_answers_refuse_a_missing_or_wrong_token(service: Service) -> None:
    for path in ("/v1/status", "/v1/rules", "/v1/alerts", "/v1/history"):
        assert get(service, path, items="tea").status == 401
        assert get(service, path, "wrong", items="tea").status == 401


def test_rules_carry_since_and_last_change_with_its_evidence(service: Service) -> None:
    body = get(service, "/v1/rules", TOKEN, limit=10000).json()
    rules = body["rules"]
    assert rules and body["version"] == f"{service.pipeline.closes}.{body['window']['last_seq']}"
    listing = service.pipeline.monitor.listing
    alerts = {a["id"]: a for a in service.pipeline.alert_history}
    changed = 0
    for r in rules:
        state = listing.rules[(tuple(r["antecedent"]), tuple(r["consequent"]))]
        assert r["since_seq"] == state.since_seq and r["since_pane"] == state.since_pane
        if state.last_change is None:
            assert r["last_change"] is None
            continue
        changed += 1
        change = r["last_change"]
        assert {k: change[k] for k in ("kind", "id", "seq", "pane")} == state.last_change
        assert change["evidence"] == alerts[change["id"]]["evidence"]
    # the promotion's rule emerged: it carries that change
    assert changed >= 1
    promo = [r for r in rules if set(r["antecedent"] + r["consequent"]) == set(PROMOTION)]
    assert any(r["last_change"] and r["last_change"]["kind"] == "emerged" for r in promo)


def test_rules_since_the_current_version_answer_unchanged(service: Service) -> None:
    full = get(service, "/v1/rules", TOKEN).json()
    same = get(service, "/v1/rules", TOKEN, since=full["version"]).json()
    assert same == {
        "as_of": full["as_of"],
        "version": full["version"],
        "window": full["window"],
        "unchanged": True,
    }
    other = get(service, "/v1/rules", TOKEN, since="3.1500").json()
    assert other["rules"] == full["rules"]


def test_history_answers(service: Service) -> None:
    promo = get(service, "/v1/history", TOKEN, items=list(PROMOTION)).json()
    assert promo["items"] == sorted(PROMOTION)
    assert promo["followed"] is True
    points = promo["points"]
    closes = [p["pane_close"] for p in points]
    # one point per pane close, up to the last one
    assert closes == list(range(closes[0], service.pipeline.closes + 1))
    assert [p["last_seq"] for p in points] == [500 * c for c in closes]
    kinds = {a["kind"] for a in promo["alerts"]}
    assert {"surged", "emerged"} <= kinds
    # alert marks sit on a point (the pane close that raised them)
    assert {a["seq"] for a in promo["alerts"]} <= {p["last_seq"] for p in points}
    # incremental: only the points after the pane close the reader has
    tail = get(service, "/v1/history", TOKEN, items=list(PROMOTION), since=closes[-3]).json()
    assert tail["points"] == points[-2:]
    assert all(a["seq"] > points[-3]["last_seq"] for a in tail["alerts"])
    # an itemset with no history: 200, no points, not followed
    none = get(service, "/v1/history", TOKEN, items=["no-such-item", "rosehip-jam"]).json()
    assert none["points"] == [] and none["followed"] is False and none["alerts"] == []
    assert none["as_of"] == promo["as_of"]


@pytest.mark.parametrize(
    ("query", "message"),
    [
        ({}, "items"),
        ({"items": ["a", "b", "c", "d"]}, "max_itemset_size"),
        ({"items": ["a"], "since": "-1"}, "since"),
        ({"items": ["a"], "limit": "3"}, "unknown parameter"),
        ({"items": [""]}, "items"),
    ],
)
def test_history_refuses_bad_parameters(service: Service, query: dict, message: str) -> None:
    res = get(service, "/v1/history", TOKEN, **query)
    assert res.status == 400, res.body
    assert message in res.json()["error"]["message"]


# -- item details with a catalogue --------------------------------------------------------------


@pytest.fixture(scope="module")
def shop(tmp_path_factory: pytest.TempPathFactory) -> tuple[Service, dict[str, Any]]:
    """The demo shop as its log holds it (SKUs, fee lines), counted at the SKU and product
    levels with the demo's catalogue file; and that file read with the csv module (the
    reference for every level and display name)."""
    catalogue = write_catalogue(tmp_path_factory.mktemp("shop") / "catalogue.csv")
    config = demo_config(None, str(catalogue), ("sku", "product"))
    svc = Service(config, sources=[PacedFeedSource(demo_orders(7, ORDERS), 0)])
    svc.run(install_signals=False)
    return svc, catalogue_details(catalogue)


def _expected_details(names: Any, facts: dict[str, Any]) -> dict[str, Any]:
    return {n: facts[n] for n in sorted(set(names)) if n in facts}


def test_answers_carry_the_level_and_display_name_of_their_items(
    shop: tuple[Service, dict[str, Any]], service: Service
) -> None:
    svc, facts = shop
    rules = get(svc, "/v1/rules", TOKEN, limit=10000).json()
    names = [n for r in rules["rules"] for n in r["antecedent"] + r["consequent"]]
    assert names and rules["item_details"] == _expected_details(names, facts)
    levels = {d["level"] for d in rules["item_details"].values()}
    # rules between SKUs and between products (a product sold in one SKU is that SKU)
    assert levels == {"sku", "product"}, levels
    assert facts["wool-throw/ochre"] == {"level": "sku", "display_name": "Wool throw, ochre"}
    # every item counted is in the catalogue: each one named is described
    assert set(rules["item_details"]) == set(names)

    itemsets = get(svc, "/v1/itemsets", TOKEN, min_support=0.01, limit=100000).json()
    names = [n for s in itemsets["itemsets"] for n in s["items"]]
    assert itemsets["item_details"] == _expected_details(names, facts)
    assert {"wool-throw", "wool-throw/ochre"} <= set(itemsets["item_details"])

    history = get(svc, "/v1/history", TOKEN, items=["wool-throw", "no-such-item"]).json()
    assert history["item_details"] == {"wool-throw": facts["wool-throw"]}

    # alert records carry theirs, from the pane close that raised them
    alerts = get(svc, "/v1/alerts", TOKEN, limit=1000).json()["alerts"]
    assert alerts
    for a in alerts:
        assert a["item_details"] == _expected_details(a["items"], facts)

    # without a catalogue: no key at all, as before
    for path in ("/v1/rules", "/v1/itemsets", "/v1/alerts"):
        body = get(service, path, TOKEN).json()
        assert "item_details" not in body
        assert all("item_details" not in a for a in body.get("alerts", []))
    assert "item_details" not in get(service, "/v1/history", TOKEN, items=["tea"]).json()


def test_status_has_what_the_page_shows(service: Service) -> None:
    st = get(service, "/v1/status", TOKEN).json()
    assert st["fill"] == 1.0  # 6,000 of the window's 6,000 orders
    assert st["min_support"] == 0.03
    assert st["checkpoints"] is False
    assert st["sinks"] == {}  # the in-process demo service has no sink configured
    assert st["page"] == {"refresh_seconds": 3.0}
    assert st["event_lag_seconds"] is not None and st["event_lag_seconds"] >= 0
    assert st["orders_per_second"] >= 0
    history = st["history"]
    assert history["last_close"] == service.pipeline.closes
    assert 0 < history["points"] <= history["max_points"] == 200000


def test_history_survives_a_restart_and_old_checkpoints_are_refused(tmp_path: Any) -> None:
    first = _service(tmp_path)
    first.run(install_signals=False)
    before = first.api.history(list(PROMOTION), None)
    assert before["points"]
    second = _service(tmp_path)
    try:
        assert second.history.view.points == first.history.view.points
        again = second.history.view.points_of(PROMOTION)
        assert again == before["points"]
    finally:
        second.shutdown()
    # a checkpoint of the previous state version is refused with the usual message
    assert STATE_VERSION == 3
    directory = tmp_path / "ck"
    loaded = load_latest_checkpoint(directory, fingerprint=first._fingerprint)
    assert loaded is not None
    meta, arrays = loaded
    save_checkpoint(
        directory,
        meta={**meta, "state_version": 2},
        arrays=arrays,
        fingerprint=first._fingerprint,
        settings=fingerprint_settings(first.config),
    )
    with pytest.raises(CheckpointError, match=r"state version 2.*--fresh"):
        _service(tmp_path)
