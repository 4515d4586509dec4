"""The example webhook receiver deduplicates on the alert id (a restart re-sends alerts)."""

from __future__ import annotations

import json
import socket
import subprocess
import sys
import time
import urllib.request
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


def test_receiver_prints_each_alert_id_once() -> None:
    port = _free_port()
    proc = subprocess.Popen(
        [sys.executable, str(ROOT / "examples" / "webhook_receiver.py"), "--port", str(port)],
        stdout=subprocess.PIPE,
        text=True,
    )
    try:
        assert proc.stdout is not None
        assert "listening" in proc.stdout.readline()
        record = {"id": "0123456789abcdef", "kind": "emerged", "items": ["scone", "plum-jam"]}
        other = {**record, "id": "fedcba9876543210"}
        for body in (record, record, other, record):
            req = urllib.request.Request(
                f"http://127.0.0.1:{port}/alerts",
                data=json.dumps(body).encode(),
                headers={"Content-Type": "application/json"},
            )
            with urllib.request.urlopen(req, timeout=5) as resp:
                assert resp.status == 204
        time.sleep(0.2)
    finally:
        proc.terminate()
        out, _ = proc.communicate(timeout=10)
    printed = [line for line in out.splitlines() if line.startswith("emerged")]
    assert len(printed) == 2
    assert "id=0123456789abcdef" in printed[0] and "id=fedcba9876543210" in printed[1]
