"""A tiny webhook receiver for streamcount alert records (for trying the webhook sink).

Run ``python examples/webhook_receiver.py --port 8765`` and set
``sinks.webhook.url: http://127.0.0.1:8765/alerts``. Each POSTed record is printed as one line;
records seen before (same ``id``, e.g. re-sent after a restart) are skipped.
"""

from __future__ import annotations

import argparse
import contextlib
import json
from http.server import BaseHTTPRequestHandler, ThreadingHTTPServer

_seen: set[str] = set()


class _Handler(BaseHTTPRequestHandler):
    def do_POST(self) -> None:
        length = int(self.headers.get("Content-Length") or 0)
        try:
            record = json.loads(self.rfile.read(length))
        except ValueError:
            self.send_response(400)
            self.end_headers()
            return
        if record.get("id") not in _seen:
            _seen.add(record.get("id"))
            rule = record.get("antecedent"), record.get("consequent")
            print(f"{record.get('kind')}: items={record.get('items')} rule={rule}", flush=True)
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
