"""Run ``streamcount run`` as a real subprocess for end-to-end tests.

:class:`ServiceRunner` writes a YAML config into a temporary directory, starts
``sys.executable -m streamcount run --config FILE ...`` there (so relative paths such as the
dead-letter file land in the temporary directory), finds the port the service bound (the
config listens on ``127.0.0.1:0`` and the service logs the port it got, so no port is guessed),
and talks to it over real HTTP. Every process it started is killed when the runner closes, so
no process outlives a test even when the test fails.

Waiting is always bounded (:data:`DEADLINE_SECONDS` by default) and a timeout fails with what
was waited for, the last value seen and the process's stderr.
"""

from __future__ import annotations

import contextlib
import http.client
import json
import os
import re
import signal
import subprocess
import sys
import time
from collections.abc import Callable, Iterator, Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import pytest
import yaml
from prometheus_client.parser import text_string_to_metric_families

__all__ = [
    "DEADLINE_SECONDS",
    "HttpResult",
    "ServiceProcess",
    "ServiceRunner",
    "merge",
    "parse_metrics",
    "service_runner",
    "shop_baskets",
    "wait_until",
]

#: longest wait for any condition (start-up, counting, exit); generous for a loaded CI machine
DEADLINE_SECONDS = 60.0
_POLL_SECONDS = 0.05
_LISTENING = re.compile(r"listening on http://127\.0\.0\.1:(\d+)")


def merge(base: Mapping[str, Any], extra: Mapping[str, Any]) -> dict[str, Any]:
    """A deep copy of ``base`` with the sections and keys of ``extra`` laid over it."""
    out: dict[str, Any] = {}
    for key, value in base.items():
        out[key] = merge(value, {}) if isinstance(value, Mapping) else value
    for key, value in extra.items():
        if isinstance(value, Mapping) and isinstance(out.get(key), Mapping):
            out[key] = merge(out[key], value)
        else:
            out[key] = merge(value, {}) if isinstance(value, Mapping) else value
    return out


def wait_until(
    condition: Callable[[], Any],
    what: str,
    *,
    timeout: float = DEADLINE_SECONDS,
    details: Callable[[], str] = lambda: "",
) -> Any:
    """Call ``condition`` until it returns something truthy; fail after ``timeout`` seconds."""
    deadline = time.monotonic() + timeout
    while True:
        result = condition()
        if result:
            return result
        if time.monotonic() > deadline:
            pytest.fail(f"timed out after {timeout:g} s waiting for {what}\n{details()}")
        time.sleep(_POLL_SECONDS)


def parse_metrics(text: str) -> dict[tuple[str, tuple[tuple[str, str], ...]], float]:
    """Every sample of a Prometheus text exposition: ``(sample name, sorted labels) -> value``.

    Parsed with prometheus-client's own text parser, so a malformed exposition fails here.
    """
    out: dict[tuple[str, tuple[tuple[str, str], ...]], float] = {}
    for family in text_string_to_metric_families(text):
        for sample in family.samples:
            out[(sample.name, tuple(sorted(sample.labels.items())))] = float(sample.value)
    return out


#: an invented shop's products (no real brands)
SHOP_ITEMS: tuple[str, ...] = (
    "oat-loaf", "plum-jam", "loose-tea", "scone", "clotted-cream", "rye-crackers",
    "goat-cheese", "fig-chutney", "lemon-curd", "honey-jar", "oat-milk", "cocoa-tin",
    "ginger-snaps", "apple-juice", "sea-salt", "olive-tapenade", "barley-soup", "pear-cider",
)  # fmt: skip


def shop_baskets(
    n: int,
    seed: int,
    *,
    planted: Sequence[str] = ("loose-tea", "scone", "clotted-cream"),
    planted_rate: float = 0.25,
    max_items: int = 5,
) -> list[list[str]]:
    """``n`` seeded random baskets of :data:`SHOP_ITEMS` with ``planted`` bought together
    in about ``planted_rate`` of them (so there are rules to find)."""
    import random

    rng = random.Random(seed)
    pool = [item for item in SHOP_ITEMS if item not in planted]
    out = []
    for _ in range(n):
        basket = rng.sample(pool, rng.randint(1, max_items))
        if rng.random() < planted_rate:
            basket += list(planted[: rng.randint(2, len(planted))])
        rng.shuffle(basket)
        out.append(basket)
    return out


@dataclass(frozen=True)
class HttpResult:
    """One HTTP response as received over the socket."""

    status: int
    headers: dict[str, str]
    body: bytes

    def json(self) -> Any:
        return json.loads(self.body)


class ServiceProcess:
    """One running ``streamcount`` process and its log files."""

    def __init__(self, proc: subprocess.Popen[bytes], stdout_path: Path, stderr_path: Path) -> None:
        self.proc = proc
        self.stdout_path = stdout_path
        self.stderr_path = stderr_path
        self.port: int | None = None

    # -- process ---------------------------------------------------------------------------

    @property
    def pid(self) -> int:
        return self.proc.pid

    def stderr(self) -> str:
        try:
            return self.stderr_path.read_text(encoding="utf-8", errors="replace")
        except FileNotFoundError:
            return ""

    def describe(self) -> str:
        """Exit code and stderr, for failure messages."""
        code = self.proc.poll()
        state = "still running" if code is None else f"exited with code {code}"
        return f"process {self.pid} {state}; its stderr:\n{self.stderr()[-6000:]}"

    def wait_exit(self, timeout: float = DEADLINE_SECONDS) -> int:
        """Wait for the process to end by itself; its exit code."""
        try:
            return self.proc.wait(timeout=timeout)
        except subprocess.TimeoutExpired:
            pytest.fail(f"process did not exit within {timeout:g} s\n{self.describe()}")

    def stop(self, sig: int = signal.SIGTERM, timeout: float = DEADLINE_SECONDS) -> int:
        """Send ``sig`` and wait for the process to exit; its exit code."""
        if self.proc.poll() is None:
            self.proc.send_signal(sig)
        return self.wait_exit(timeout)

    def kill(self) -> None:
        """SIGKILL (no clean-up in the process) and reap it."""
        if self.proc.poll() is None:
            self.proc.kill()
        self.proc.wait(timeout=DEADLINE_SECONDS)

    def wait_log(self, pattern: str, timeout: float = DEADLINE_SECONDS) -> re.Match[str]:
        """Wait for a line of stderr matching the regular expression ``pattern``."""
        regex = re.compile(pattern)

        def found() -> re.Match[str] | None:
            match = regex.search(self.stderr())
            if match is None and self.proc.poll() is not None:
                pytest.fail(f"process ended before logging {pattern!r}\n{self.describe()}")
            return match

        return wait_until(  # type: ignore[no-any-return]
            found, f"a log line matching {pattern!r}", timeout=timeout, details=self.describe
        )

    def wait_listening(self, timeout: float = DEADLINE_SECONDS) -> int:
        """The port the service bound (from its start-up log line)."""
        self.port = int(self.wait_log(_LISTENING.pattern, timeout).group(1))
        return self.port

    # -- HTTP ------------------------------------------------------------------------------

    def request(
        self,
        method: str,
        path: str,
        body: bytes | None = None,
        headers: Mapping[str, str] | None = None,
        timeout: float = 10.0,
    ) -> HttpResult:
        """One request on a new connection to the service."""
        if self.port is None:
            self.wait_listening()
        conn = http.client.HTTPConnection("127.0.0.1", self.port, timeout=timeout)
        try:
            conn.request(method, path, body=body, headers=dict(headers or {}))
            resp = conn.getresponse()
            data = resp.read()
            return HttpResult(resp.status, {k.lower(): v for k, v in resp.getheaders()}, data)
        finally:
            conn.close()

    def get_json(self, path: str, headers: Mapping[str, str] | None = None) -> Any:
        result = self.request("GET", path, headers=headers)
        assert result.status == 200, (path, result.status, result.body, self.describe())
        return result.json()

    def status(self, headers: Mapping[str, str] | None = None) -> dict[str, Any]:
        return self.get_json("/v1/status", headers)  # type: ignore[no-any-return]

    def wait_status(
        self,
        condition: Callable[[dict[str, Any]], bool],
        what: str,
        *,
        timeout: float = DEADLINE_SECONDS,
        headers: Mapping[str, str] | None = None,
    ) -> dict[str, Any]:
        """Poll GET /v1/status until ``condition(status)`` holds; the status that passed."""
        last: list[dict[str, Any]] = [{}]

        def check() -> dict[str, Any] | None:
            if self.proc.poll() is not None:
                pytest.fail(f"process ended while waiting for {what}\n{self.describe()}")
            status = self.status(headers)
            last[0] = status
            return status if condition(status) else None

        def details() -> str:
            return f"last status: {json.dumps(last[0])}\n{self.describe()}"

        return wait_until(check, what, timeout=timeout, details=details)  # type: ignore[no-any-return]

    def wait_counted(self, seen: int, last_seq: int | None = None) -> dict[str, Any]:
        """Wait until ``seen`` transactions are accepted and counted through ``last_seq``."""
        last = seen if last_seq is None else last_seq
        return self.wait_status(
            lambda s: s["transactions_seen"] == seen and s["window"]["last_seq"] == last,
            f"transactions_seen == {seen} and window.last_seq == {last}",
        )

    def metrics(
        self, headers: Mapping[str, str] | None = None
    ) -> dict[tuple[str, tuple[tuple[str, str], ...]], float]:
        """GET /metrics over HTTP (``headers``: the token, when one is set), parsed with
        prometheus-client's text parser."""
        result = self.request("GET", "/metrics", headers=headers)
        assert result.status == 200, (result.status, result.body)
        assert result.headers["content-type"].startswith("text/plain"), result.headers
        return parse_metrics(result.body.decode("utf-8"))


class ServiceRunner:
    """Starts ``streamcount`` subprocesses in ``workdir`` and kills them all on :meth:`close`.

    Parameters
    ----------
    workdir:
        The test's ``tmp_path``: configs, logs and relative paths go there.
    base_config:
        Laid under every config passed to :meth:`start` (listen on a free port of
        127.0.0.1, dead-letter file in ``workdir``).
    """

    def __init__(self, workdir: Path, base_config: Mapping[str, Any] | None = None) -> None:
        self.workdir = Path(workdir)
        self.base_config = merge(
            {
                "input": {"dead_letter_path": str(self.workdir / "dead-letter.jsonl")},
                "server": {"listen": "127.0.0.1:0"},
                "sinks": {"log": False},
            },
            base_config or {},
        )
        self._processes: list[ServiceProcess] = []
        self._count = 0

    def write_config(self, config: Mapping[str, Any], *, raw: bool = False) -> Path:
        """Write ``config`` (laid over the base config unless ``raw``) as YAML; its path."""
        self._count += 1
        path = self.workdir / f"config-{self._count}.yaml"
        data = dict(config) if raw else merge(self.base_config, config)
        path.write_text(yaml.safe_dump(data, sort_keys=False), encoding="utf-8")
        return path

    def _env(self, env: Mapping[str, str] | None) -> dict[str, str]:
        out = dict(os.environ)
        out.update(env or {})
        return out

    def spawn(self, args: Sequence[str], *, env: Mapping[str, str] | None = None) -> ServiceProcess:
        """Start ``python -m streamcount ARGS`` in the work directory."""
        n = len(self._processes) + 1
        stdout_path = self.workdir / f"proc-{n}.stdout"
        stderr_path = self.workdir / f"proc-{n}.stderr"
        with open(stdout_path, "wb") as out, open(stderr_path, "wb") as err:
            proc = subprocess.Popen(
                [sys.executable, "-m", "streamcount", *args],
                cwd=self.workdir,
                env=self._env(env),
                stdin=subprocess.DEVNULL,
                stdout=out,
                stderr=err,
            )
        service = ServiceProcess(proc, stdout_path, stderr_path)
        self._processes.append(service)
        return service

    def start(
        self,
        config: Mapping[str, Any],
        *args: str,
        env: Mapping[str, str] | None = None,
        wait: bool = True,
    ) -> ServiceProcess:
        """``streamcount run --config <config as YAML> ARGS``; waits for the listener."""
        path = self.write_config(config)
        service = self.spawn(["run", "--config", str(path), *args], env=env)
        if wait:
            service.wait_listening()
        return service

    def run_cli(
        self, *args: str, env: Mapping[str, str] | None = None, timeout: float = DEADLINE_SECONDS
    ) -> subprocess.CompletedProcess[str]:
        """Run ``python -m streamcount ARGS`` to completion; output captured as text."""
        try:
            return subprocess.run(
                [sys.executable, "-m", "streamcount", *args],
                cwd=self.workdir,
                env=self._env(env),
                stdin=subprocess.DEVNULL,
                capture_output=True,
                text=True,
                timeout=timeout,
                check=False,
            )
        except subprocess.TimeoutExpired as exc:
            pytest.fail(f"streamcount {' '.join(args)} did not finish in {timeout:g} s: {exc}")

    def close(self) -> None:
        """Kill every process still running (SIGKILL) and reap it."""
        for service in self._processes:
            if service.proc.poll() is None:
                with contextlib.suppress(ProcessLookupError):
                    service.proc.kill()
            with contextlib.suppress(subprocess.TimeoutExpired):
                service.proc.wait(timeout=DEADLINE_SECONDS)

    def __enter__(self) -> ServiceRunner:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()


@contextlib.contextmanager
def service_runner(
    workdir: Path, base_config: Mapping[str, Any] | None = None
) -> Iterator[ServiceRunner]:
    """A :class:`ServiceRunner` that kills its processes on exit (use in a fixture)."""
    runner = ServiceRunner(workdir, base_config)
    try:
        yield runner
    finally:
        runner.close()


def basket_lines(baskets: list[list[str]]) -> bytes:
    """Basket lines (items separated by spaces), one per basket, as bytes."""
    return b"".join((" ".join(b) + "\n").encode() for b in baskets)


def append_bytes(path: Path, data: bytes) -> None:
    """Append to a followed file the way a writer would (open, write, close)."""
    with open(path, "ab") as fh:
        fh.write(data)
