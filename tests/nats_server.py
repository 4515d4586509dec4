"""A private ``nats-server`` with JetStream for the tests, and a few JetStream helpers.

:class:`NatsServer` starts Debian's ``nats-server`` (found by :func:`tools.require_tool`:
skipped by hand when missing, failed under ``CI=true``) on a free port of 127.0.0.1 with its
store in a temporary directory (``-js -sd DIR``), and can stop and start it again on the same
port and store, as a restart of the server. Nothing is mocked: the helpers talk to it with
nats-py, each call on an event loop of its own.
"""

from __future__ import annotations

import asyncio
import contextlib
import socket
import subprocess
import time
from collections.abc import Coroutine, Iterable, Iterator, Sequence
from pathlib import Path
from typing import Any, TypeVar

import pytest
from tools import require_tool

__all__ = [
    "NatsServer",
    "add_stream",
    "consumer_info",
    "nats_server_running",
    "publish",
    "run_async",
    "stream_info",
    "stream_messages",
]

T = TypeVar("T")

_START_SECONDS = 20.0


def free_port() -> int:
    """A TCP port of 127.0.0.1 free right now."""
    with socket.socket() as sock:
        sock.bind(("127.0.0.1", 0))
        return int(sock.getsockname()[1])


def run_async(coro: Coroutine[Any, Any, T]) -> T:
    """Run one coroutine to completion on a new event loop."""
    return asyncio.run(coro)


class NatsServer:
    """One ``nats-server -js`` process on 127.0.0.1, restartable on the same port and store."""

    def __init__(self, binary: str, store: Path, port: int | None = None) -> None:
        self.binary = binary
        self.store = store
        self.port = port or free_port()
        self.log = store / "nats-server.log"
        self.proc: subprocess.Popen[bytes] | None = None

    @property
    def url(self) -> str:
        return f"nats://127.0.0.1:{self.port}"

    def start(self) -> None:
        """Start the server and wait until it accepts connections and JetStream answers."""
        self.store.mkdir(parents=True, exist_ok=True)
        cmd = [self.binary, "-js", "-sd", str(self.store), "-a", "127.0.0.1"]
        cmd += ["-p", str(self.port), "-l", str(self.log)]
        self.proc = subprocess.Popen(cmd, stdin=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
        deadline = time.monotonic() + _START_SECONDS
        while True:
            if self.proc.poll() is not None:
                pytest.fail(f"nats-server exited with {self.proc.returncode}: {self._log_tail()}")
            try:
                run_async(_account_info(self.url))
                return
            except Exception as exc:
                if time.monotonic() > deadline:
                    pytest.fail(f"nats-server not ready in {_START_SECONDS} s ({exc})")
                time.sleep(0.05)

    def stop(self, *, kill: bool = False) -> None:
        """Stop the server (SIGTERM, or SIGKILL with ``kill``) and reap it."""
        if self.proc is None:
            return
        if self.proc.poll() is None:
            if kill:
                self.proc.kill()
            else:
                self.proc.terminate()
        try:
            self.proc.wait(timeout=_START_SECONDS)
        except subprocess.TimeoutExpired:
            self.proc.kill()
            self.proc.wait(timeout=_START_SECONDS)
        self.proc = None

    def restart(self, *, kill: bool = False, down_seconds: float = 0.0) -> None:
        """Stop, stay down ``down_seconds``, start again on the same port and store."""
        self.stop(kill=kill)
        time.sleep(down_seconds)
        self.start()

    def _log_tail(self) -> str:
        try:
            return self.log.read_text(errors="replace")[-2000:]
        except FileNotFoundError:
            return "(no log)"


@contextlib.contextmanager
def nats_server_running(store: Path) -> Iterator[NatsServer]:
    """A started :class:`NatsServer` (the test skips, or fails under CI, without the program)."""
    server = NatsServer(require_tool("nats-server"), store)
    server.start()
    try:
        yield server
    finally:
        server.stop()


async def _quiet(exc: Exception) -> None:
    """nats-py logs every failed connection attempt with a traceback unless told otherwise;
    the callers retry or fail with their own message."""


async def _connect(url: str) -> Any:
    import nats

    return await nats.connect(
        url,
        connect_timeout=2,
        allow_reconnect=False,
        max_reconnect_attempts=1,  # else nats-py retries a refused connection for two minutes
        reconnect_time_wait=0.05,
        error_cb=_quiet,
    )


async def _account_info(url: str) -> None:
    nc = await _connect(url)
    try:
        await nc.jetstream().account_info()
    finally:
        await nc.close()


def add_stream(
    url: str,
    name: str = "ORDERS",
    subjects: Sequence[str] = ("orders.>",),
    **limits: Any,
) -> None:
    """Create a file-storage stream with limits retention (``max_msgs=``... as limits)."""
    from nats.js.api import StorageType, StreamConfig

    async def go() -> None:
        nc = await _connect(url)
        try:
            config = StreamConfig(
                name=name, subjects=list(subjects), storage=StorageType.FILE, **limits
            )
            await nc.jetstream().add_stream(config)
        finally:
            await nc.close()

    run_async(go())


def publish(url: str, subject: str, payloads: Iterable[bytes], *, window: int = 500) -> list[int]:
    """Publish each payload to JetStream, waiting for the stream's acknowledgements (in
    windows of ``window`` at a time); the stream sequences they got, in order."""

    async def go() -> list[int]:
        nc = await _connect(url)
        js = nc.jetstream()
        seqs: list[int] = []
        try:
            chunk: list[bytes] = []
            for payload in payloads:
                chunk.append(payload)
                if len(chunk) >= window:
                    seqs += await _publish_chunk(js, subject, chunk)
                    chunk = []
            if chunk:
                seqs += await _publish_chunk(js, subject, chunk)
        finally:
            await nc.close()
        return seqs

    return run_async(go())


async def _publish_chunk(js: Any, subject: str, chunk: list[bytes]) -> list[int]:
    acks = await asyncio.gather(*(js.publish(subject, p, timeout=10) for p in chunk))
    return [int(a.seq) for a in acks]


def stream_info(url: str, name: str = "ORDERS") -> Any:
    async def go() -> Any:
        nc = await _connect(url)
        try:
            return await nc.jetstream().stream_info(name)
        finally:
            await nc.close()

    return run_async(go())


def consumer_info(url: str, stream: str = "ORDERS", durable: str = "streamcount") -> Any:
    async def go() -> Any:
        nc = await _connect(url)
        try:
            return await nc.jetstream().consumer_info(stream, durable)
        finally:
            await nc.close()

    return run_async(go())


def stream_messages(url: str, name: str = "ORDERS") -> list[tuple[str, bytes]]:
    """Every message the stream holds, in sequence order: ``(subject, data)``."""

    async def go() -> list[tuple[str, bytes]]:
        nc = await _connect(url)
        try:
            js = nc.jetstream()
            state = (await js.stream_info(name)).state
            out = []
            for seq in range(state.first_seq, state.last_seq + 1):
                msg = await js.get_msg(name, seq)
                out.append((msg.subject, msg.data))
            return out
        finally:
            await nc.close()

    return run_async(go())
