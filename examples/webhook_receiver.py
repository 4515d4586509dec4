"""A tiny webhook receiver for streamcount alert records (for trying the webhook sink).

Run ``python examples/webhook_receiver.py --port 8765`` and set
``sinks.webhook.url: http://127.0.0.1:8765/alerts``. Each POSTed record is printed as one line.
Records seen before (same ``id``) are skipped: after a crash, streamcount resumes from its last
checkpoint and raises the alerts of the panes since then again, with the same ids, so a
receiver that deduplicates on ``id`` sees each alert once. Alerts are signals for a person to
review, not decisions.
"""

from __future__ import annotations

import argparse
import contextlib
import json
import threading
from collections import OrderedDict
from http.server import BaseHTTPRequestHandler, ThreadingHTTPServer

#: ids already printed (the most recent ones; bounded so a long run does not grow forever)
_seen: OrderedDict[str, None] = OrderedDict()
_SEEN_MAX = 100_000
_lock = threading.Lock()


def first_time(alert_id: str) -> bool:
    """True the first time an id is seen (thread-safe)."""
    with _lock:
        if alert_id in _seen:
            _seen.move_to_end(alert_id)
            return False
        _seen[alert_id] = None
        if len(_seen) > _SEEN_MAX:
            _seen.popitem(last=False)
        return True


class _Handler(BaseHTTPRequestHandler):
    def do_POST(self) -> None:
        length = int(self.headers.get("Content-Length") or 0)
        try:
            record = json.loads(self.rfile.read(length))
        except ValueError:
            self.send_response(400)
            self.end_headers()
            return
        if first_time(str(record.get("id"))):
            rule = record.get("antecedent"), record.get("consequent")
            evidence = record.get("evidence") or {}
            before = (evidence.get("reference_rate") or {}).get("value")
            now = (evidence.get("recent_rate") or {}).get("value")
            print(
                f"{record.get('kind')}: items={record.get('items')} rule={rule} "
                f"rate {before} -> {now} since seq {evidence.get('change_seq')} "
                f"id={record.get('id')}",
                flush=True,
            )
        self.send_response(204)
        self.end_headers()

    def log_message(self, format: str, *args: object) -> None:  # quiet access log
        pass


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--port", type=int, default=8765)
    args = parser.parse_args()
    server = ThreadingHTTPServer(("127.0.0.1", args.port), _Handler)
    print(f"listening on http://127.0.0.1:{args.port}/alerts", flush=True)
    with contextlib.suppress(KeyboardInterrupt):
        server.serve_forever()


if __name__ == "__main__":
    main()
