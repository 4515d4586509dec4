"""The HTTP API: route() without a socket, and a real server on 127.0.0.1 with a fake backend."""

from __future__ import annotations

import http.client
import json
import socket
from collections.abc import Iterator
from typing import Any

import pytest
from prometheus_client import CONTENT_TYPE_LATEST, CollectorRegistry, generate_latest
from prometheus_client.parser import text_string_to_metric_families

from streamcount.engine.snapshot import EngineStatistics
from streamcount.errors import InputError
from streamcount.service.metrics import Metrics
from streamcount.service.server import MAX_LIMIT, Response, route, start_server

TOKEN = "t0k3n-for-tests"


class FakeBackend:
    """In-memory ApiBackend that records the arguments it was asked with."""

    def __init__(self, *, ingest: bool = True) -> None:
        self.registry = CollectorRegistry()
        self.metrics = Metrics(registry=self.registry, statistics=self._stats)
        self.is_ready = True
        self.ingest_on = ingest
        self.calls: list[tuple[str, tuple[Any, ...]]] = []
        self.ingested: list[tuple[bytes, str]] = []
        self.fail = False

    @staticmethod
    def _stats() -> EngineStatistics:
        return EngineStatistics(42, {}, 40, 1, (12, 5), 4096, 3, 4, 2, None, 12)

    def metrics_payload(self) -> tuple[bytes, str]:
        return generate_latest(self.registry), CONTENT_TYPE_LATEST

    def healthy(self) -> bool:
        return True

    def ready(self) -> bool:
        return self.is_ready

    def status(self) -> dict[str, Any]:
        if self.fail:
            raise RuntimeError("backend broke")
        return {"transactions_seen": 42}

    def itemsets(self, min_support: float | None, size: int | None, limit: int) -> dict[str, Any]:
        self.calls.append(("itemsets", (min_support, size, limit)))
        return {"itemsets": [{"items": ["jam", "scone"], "count": 7}]}

    def rules(
        self,
        sort: str,
        limit: int,
        min_confidence: float | None,
        min_lift: float | None,
        min_support: float | None,
    ) -> dict[str, Any]:
        self.calls.append(("rules", (sort, limit, min_confidence, min_lift, min_support)))
        return {"rules": []}

    def alerts(self, since: int | None, limit: int) -> dict[str, Any]:
        self.calls.append(("alerts", (since, limit)))
        return {"alerts": [], "next": 0}

    def ingest_enabled(self) -> bool:
        return self.ingest_on

    def ingest(self, body: bytes, content_type: str) -> dict[str, Any]:
        if body.startswith(b"{bad"):
            raise InputError("line 1: not JSON")
        self.ingested.append((body, content_type))
        return {"accepted": body.count(b"\n")}


def _route(method: str, path: str, backend: FakeBackend, **kw: Any) -> Response:
    return route(
        method,
        path,
        kw.pop("query", {}),
        kw.pop("headers", {}),
        kw.pop("body", b""),
        backend,
        **kw,
    )


# --- route() without a socket -----------------------------------------------------------------


def test_route_params_are_typed_and_passed() -> None:
    be = FakeBackend()
    query = {"min_support": ["0.05"], "size": ["2"], "limit": ["50"]}
    resp = _route("GET", "/v1/itemsets", be, query=query)
    assert resp.status == 200
    assert resp.json()["itemsets"][0]["items"] == ["jam", "scone"]
    assert be.calls[-1] == ("itemsets", (0.05, 2, 50))
    _route("GET", "/v1/rules", be)
    assert be.calls[-1] == ("rules", ("lift", 100, None, None, None))
    _route("GET", "/v1/rules", be, query={"sort": ["confidence"], "min_lift": ["2"]})
    assert be.calls[-1] == ("rules", ("confidence", 100, None, 2.0, None))
    _route("GET", "/v1/alerts", be, query={"since": ["17"], "limit": [str(MAX_LIMIT * 5)]})
    assert be.calls[-1] == ("alerts", (17, MAX_LIMIT))


@pytest.mark.parametrize(
    ("path", "query", "name"),
    [
        ("/v1/itemsets", {"min_support": ["lots"]}, "min_support='lots'"),
        ("/v1/itemsets", {"min_support": ["1.5"]}, "min_support='1.5'"),
        ("/v1/itemsets", {"min_support": ["nan"]}, "min_support='nan'"),
        ("/v1/itemsets", {"size": ["0"]}, "size='0'"),
        ("/v1/itemsets", {"limit": ["ten"]}, "limit='ten'"),
        ("/v1/rules", {"sort": ["price"]}, "sort='price'"),
        ("/v1/rules", {"min_lift": ["-1"]}, "min_lift='-1'"),
        ("/v1/rules", {"min_confidence": ["2"]}, "min_confidence='2'"),
        ("/v1/alerts", {"since": ["-3"]}, "since='-3'"),
        ("/v1/alerts", {"limit": ["1", "2"]}, "given more than once"),
        ("/v1/rules", {"min_suport": ["0.1"]}, "unknown parameter"),
    ],
)
def test_route_bad_parameters(path: str, query: dict[str, list[str]], name: str) -> None:
    be = FakeBackend()
    resp = _route("GET", path, be, query=query)
    assert resp.status == 400
    err = resp.json()["error"]
    assert err["code"] == "bad_parameter"
    assert name in err["message"]
    assert be.calls == []  # the backend was never asked


def test_route_unknown_path_and_wrong_method() -> None:
    be = FakeBackend()
    resp = _route("GET", "/v1/nothing", be)
    assert resp.status == 404
    assert resp.json()["error"]["code"] == "not_found"
    resp = _route("DELETE", "/v1/rules", be)
    assert resp.status == 405
    assert resp.headers["Allow"] == "GET, HEAD"
    resp = _route("GET", "/v1/transactions", be)
    assert resp.status == 405
    assert resp.headers["Allow"] == "POST"


def test_route_ingest_disabled_is_404() -> None:
    resp = _route("POST", "/v1/transactions", FakeBackend(ingest=False), body=b"a b\n")
    assert resp.status == 404


def test_route_backend_failure_is_500_json() -> None:
    be = FakeBackend()
    be.fail = True
    resp = _route("GET", "/v1/status", be)
    assert resp.status == 500
    assert resp.json()["error"]["code"] == "internal_error"
    assert "backend broke" not in resp.body.decode()  # internals stay in the log


def test_route_token_checked_in_constant_time_form() -> None:
    be = FakeBackend()
    assert _route("GET", "/v1/status", be, token=TOKEN).status == 401
    ok = {"authorization": f"bearer {TOKEN}"}  # the scheme is case-insensitive
    assert _route("GET", "/v1/status", be, token=TOKEN, headers=ok).status == 200
    wrong = {"Authorization": f"Bearer {TOKEN}x"}
    assert _route("GET", "/v1/status", be, token=TOKEN, headers=wrong).status == 401


def test_route_body_over_limit() -> None:
    be = FakeBackend()
    resp = _route("POST", "/v1/transactions", be, body=b"x" * 11, max_request_bytes=10)
    assert resp.status == 413
    assert be.ingested == []


# --- a real server on a free port -------------------------------------------------------------


@pytest.fixture
def backend() -> FakeBackend:
    return FakeBackend()


def _serve(backend: FakeBackend, token: str | None) -> Iterator[int]:
    server, thread = start_server(
        "127.0.0.1:0",
        backend,
        token=token,
        max_request_bytes=1024,
        request_timeout_seconds=5.0,
    )
    try:
        yield server.server_port
    finally:
        server.shutdown()
        server.server_close()
        thread.join(timeout=5)
    assert not thread.is_alive()


@pytest.fixture
def open_port(backend: FakeBackend) -> Iterator[int]:
    yield from _serve(backend, None)


@pytest.fixture
def token_port(backend: FakeBackend) -> Iterator[int]:
    yield from _serve(backend, TOKEN)


def _request(
    port: int,
    method: str,
    path: str,
    *,
    body: bytes | None = None,
    headers: dict[str, str] | None = None,
) -> tuple[int, dict[str, str], bytes]:
    conn = http.client.HTTPConnection("127.0.0.1", port, timeout=10)
    try:
        conn.request(method, path, body=body, headers=headers or {})
        resp = conn.getresponse()
        return resp.status, {k.lower(): v for k, v in resp.getheaders()}, resp.read()
    finally:
        conn.close()


def test_metrics_scraped_over_socket(open_port: int, backend: FakeBackend) -> None:
    backend.metrics.observe_batch(40, {"malformed": 2}, 0.01)
    status, headers, body = _request(open_port, "GET", "/metrics")
    assert status == 200
    assert headers["content-type"] == CONTENT_TYPE_LATEST
    families = {f.name: f for f in text_string_to_metric_families(body.decode("utf-8"))}
    assert families["streamcount_transactions"].samples[0].value == 40
    rejected = {
        s.labels["reason"]: s.value
        for s in families["streamcount_records_rejected"].samples
        if s.name.endswith("_total")
    }
    assert rejected["malformed"] == 2
    assert families["streamcount_window_transactions"].samples[0].value == 40


def test_endpoints_without_token(open_port: int, backend: FakeBackend) -> None:
    status, headers, body = _request(open_port, "GET", "/v1/status")
    assert (status, json.loads(body)) == (200, {"transactions_seen": 42})
    assert headers["content-type"] == "application/json"
    status, _, body = _request(open_port, "GET", "/v1/itemsets?min_support=0.1&size=2")
    assert status == 200
    assert backend.calls[-1] == ("itemsets", (0.1, 2, 100))
    assert _request(open_port, "GET", "/healthz")[0] == 200
    assert _request(open_port, "GET", "/readyz")[0] == 200
    backend.is_ready = False
    status, _, body = _request(open_port, "GET", "/readyz")
    assert status == 503
    assert json.loads(body)["error"]["code"] == "not_ready"


def test_head_has_no_body(open_port: int) -> None:
    status, headers, body = _request(open_port, "HEAD", "/v1/status")
    assert status == 200
    assert body == b""
    assert int(headers["content-length"]) > 0


def test_token_enforced(token_port: int) -> None:
    # the probes stay open (they carry no token)
    assert _request(token_port, "GET", "/healthz")[0] == 200
    assert _request(token_port, "GET", "/readyz")[0] in (200, 503)
    # everything else needs it, /metrics included (its per-rule gauges name items)
    for path in ("/metrics", "/v1/status", "/v1/rules", "/v1/itemsets", "/v1/alerts"):
        status, headers, body = _request(token_port, "GET", path)
        assert status == 401, path
        assert json.loads(body)["error"]["code"] == "unauthorized"
        assert headers["www-authenticate"].startswith("Bearer")
    wrong = {"Authorization": "Bearer nope"}
    assert _request(token_port, "GET", "/v1/status", headers=wrong)[0] == 401
    good = {"Authorization": f"Bearer {TOKEN}"}
    assert _request(token_port, "GET", "/v1/status", headers=good)[0] == 200
    assert _request(token_port, "GET", "/metrics", headers=good)[0] == 200
    status, _, _ = _request(
        token_port,
        "POST",
        "/v1/transactions",
        body=b"a b\n",
        headers={**good, "Content-Type": "application/x-ndjson"},
    )
    assert status == 202


def test_ingest_over_socket(open_port: int, backend: FakeBackend) -> None:
    status, _, body = _request(
        open_port,
        "POST",
        "/v1/transactions",
        body=b"jam scone\ntea\n",
        headers={"Content-Type": "text/plain"},
    )
    assert (status, json.loads(body)) == (202, {"accepted": 2})
    assert backend.ingested == [(b"jam scone\ntea\n", "text/plain")]
    status, _, body = _request(
        open_port,
        "POST",
        "/v1/transactions",
        body=b"{bad json",
        headers={"Content-Type": "application/json"},
    )
    assert status == 400
    assert json.loads(body)["error"] == {"code": "bad_input", "message": "line 1: not JSON"}


def test_body_over_limit_is_413_without_reading(open_port: int, backend: FakeBackend) -> None:
    # announce a large body but send none: the server must answer from Content-Length alone
    with socket.create_connection(("127.0.0.1", open_port), timeout=10) as sock:
        sock.sendall(
            b"POST /v1/transactions HTTP/1.1\r\nHost: x\r\nContent-Length: 5000000\r\n\r\n"
        )
        reply = _read_all(sock)
    head, _, body = reply.partition(b"\r\n\r\n")
    assert head.startswith(b"HTTP/1.1 413")
    assert b"connection: close" in head.lower()
    assert json.loads(body)["error"]["code"] == "too_large"
    assert backend.ingested == []


def test_chunked_body_refused(open_port: int, backend: FakeBackend) -> None:
    with socket.create_connection(("127.0.0.1", open_port), timeout=10) as sock:
        sock.sendall(
            # headers only: the server answers before any chunk (unread chunks would make its
            # close a reset)
            b"POST /v1/transactions HTTP/1.1\r\nHost: x\r\nTransfer-Encoding: chunked\r\n\r\n"
        )
        reply = _read_all(sock)
    assert reply.startswith(b"HTTP/1.1 411")
    assert backend.ingested == []


def _read_all(sock: socket.socket) -> bytes:
    chunks = []
    while chunk := sock.recv(65536):
        chunks.append(chunk)
    return b"".join(chunks)


def test_unknown_path_and_wrong_method_over_socket(open_port: int) -> None:
    status, _, body = _request(open_port, "GET", "/admin")
    assert status == 404
    assert json.loads(body)["error"]["code"] == "not_found"
    status, headers, body = _request(open_port, "PUT", "/v1/rules", body=b"")
    assert status == 405
    assert headers["allow"] == "GET, HEAD"
    assert json.loads(body)["error"]["code"] == "method_not_allowed"


def test_bad_parameter_over_socket(open_port: int) -> None:
    status, _, body = _request(open_port, "GET", "/v1/rules?min_lift=abc")
    assert status == 400
    assert "min_lift='abc'" in json.loads(body)["error"]["message"]


def test_malformed_request_line_gets_json(open_port: int) -> None:
    with socket.create_connection(("127.0.0.1", open_port), timeout=10) as sock:
        sock.sendall(b"GARBAGE\r\n\r\n")
        reply = _read_all(sock)
    head, _, body = reply.partition(b"\r\n\r\n")
    assert b" 400 " in head.split(b"\r\n")[0]
    assert json.loads(body)["error"]["code"] == "bad_request"


def test_keep_alive_connection_serves_several_requests(open_port: int) -> None:
    conn = http.client.HTTPConnection("127.0.0.1", open_port, timeout=10)
    try:
        for _ in range(3):
            conn.request("GET", "/healthz")
            resp = conn.getresponse()
            assert resp.status == 200
            assert json.loads(resp.read()) == {"status": "ok"}
    finally:
        conn.close()


def test_start_server_refuses_bad_listen_and_empty_token(backend: FakeBackend) -> None:
    with pytest.raises(ValueError, match="host:port"):
        start_server("nowhere", backend, token=None, max_request_bytes=1, request_timeout_seconds=1)
    with pytest.raises(ValueError, match="token is empty"):
        start_server(
            "127.0.0.1:0", backend, token="", max_request_bytes=1, request_timeout_seconds=1
        )


def test_stalled_body_times_out(backend: FakeBackend) -> None:
    server, thread = start_server(
        "127.0.0.1:0", backend, token=None, max_request_bytes=1024, request_timeout_seconds=0.3
    )
    try:
        with socket.create_connection(("127.0.0.1", server.server_port), timeout=10) as sock:
            # promise 10 bytes, send 3, then wait: the server gives up after its socket timeout
            sock.sendall(b"POST /v1/transactions HTTP/1.1\r\nContent-Length: 10\r\n\r\njam")
            reply = _read_all(sock)
    finally:
        server.shutdown()
        server.server_close()
        thread.join(timeout=5)
    assert reply.startswith(b"HTTP/1.1 408")
    assert backend.ingested == []


def test_overlong_request_line_gets_json(open_port: int) -> None:
    with socket.create_connection(("127.0.0.1", open_port), timeout=10) as sock:
        # exactly the 65537 bytes http.server reads of a request line before refusing it, so
        # no unread bytes are left to turn the server's close into a reset
        sock.sendall(b"GET /" + b"a" * (65537 - 5))
        reply = _read_all(sock)
    head, _, body = reply.partition(b"\r\n\r\n")
    assert head.startswith(b"HTTP/1.1 414")
    assert json.loads(body)["error"]["code"] == "request_uri_too_long"
