"""A private ``nats-server -js`` for the benchmarks that need one (bench_nats, bench_cluster).

Debian's ``nats-server`` (``make tools``) on a free port of 127.0.0.1 with its store in a
temporary directory; :func:`start_server` returns once JetStream answers.
"""

from __future__ import annotations

import shutil
import socket
import subprocess
import time
from pathlib import Path

__all__ = ["free_port", "nats_binary", "start_server", "wait_ready"]


def nats_binary() -> str | None:
    """Where ``nats-server`` is (Debian installs it in /usr/sbin), or ``None``."""
    return shutil.which("nats-server") or shutil.which("nats-server", path="/usr/sbin:/sbin")


def free_port() -> int:
    """A TCP port of 127.0.0.1 nothing listens on right now."""
    with socket.socket() as sock:
        sock.bind(("127.0.0.1", 0))
        return int(sock.getsockname()[1])


def wait_ready(url: str, proc: subprocess.Popen[bytes], timeout: float = 20.0) -> None:
    """Return once the server at ``url`` answers a JetStream request (raise if ``proc``
    exits or ``timeout`` seconds pass first)."""
    import asyncio

    import nats

    async def quiet(exc: Exception) -> None:
        pass

    async def ping() -> None:
        nc = await nats.connect(
            url, max_reconnect_attempts=1, reconnect_time_wait=0.05, error_cb=quiet
        )
        try:
            await nc.jetstream().account_info()
        finally:
            await nc.close()

    deadline = time.monotonic() + timeout
    while True:
        if proc.poll() is not None:
            raise RuntimeError(f"nats-server exited with {proc.returncode}")
        try:
            asyncio.run(ping())
            return
        except Exception:
            if time.monotonic() > deadline:
                raise
            time.sleep(0.1)


def start_server(binary: str, store: Path) -> tuple[subprocess.Popen[bytes], str]:
    """Start ``binary`` with JetStream, its store in ``store``; the process and its URL, ready."""
    port = free_port()
    url = f"nats://127.0.0.1:{port}"
    cmd = [binary, "-js", "-sd", str(store), "-a", "127.0.0.1", "-p", str(port)]
    server = subprocess.Popen(cmd, stderr=subprocess.DEVNULL, stdout=subprocess.DEVNULL)
    try:
        wait_ready(url, server)
    except BaseException:
        server.kill()
        server.wait(timeout=30)
        raise
    return server, url
