"""Create the JetStream streams of the cluster example from their JSON configurations.

    python create_streams.py nats://127.0.0.1:4222 streams/ORDERS.json streams/PANES.json

Each file is a JetStream stream configuration as the JetStream API takes it (durations in
nanoseconds; the NATS command-line tool reads the same files: ``nats stream add --config
FILE``). A stream that exists already is left as it is. Uses nats-py, a dependency of
streamcount.
"""

from __future__ import annotations

import asyncio
import json
import sys


async def main(url: str, paths: list[str]) -> None:
    import nats
    import nats.js.errors
    from nats.js.api import StreamConfig

    nc = await nats.connect(url, connect_timeout=5, max_reconnect_attempts=1)
    try:
        js = nc.jetstream()
        for path in paths:
            with open(path, encoding="utf-8") as fh:
                config = StreamConfig.from_response(json.load(fh))
            try:
                await js.stream_info(config.name)
                print(f"stream {config.name} exists", file=sys.stderr)
            except nats.js.errors.NotFoundError:
                await js.add_stream(config)
                print(
                    f"stream {config.name} created ({', '.join(config.subjects)})", file=sys.stderr
                )
    finally:
        await nc.close()


if __name__ == "__main__":
    if len(sys.argv) < 3:
        sys.exit("usage: python create_streams.py NATS_URL STREAM.json...")
    asyncio.run(main(sys.argv[1], sys.argv[2:]))
