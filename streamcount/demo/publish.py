"""``streamcount generate --publish``: the generated feed published to NATS JetStream.

Each order goes to the subject ``--subject`` with ``{partition}`` replaced by its partition,
``crc32(order id as UTF-8) mod --partitions`` (CRC-32 as in zlib and PNG: the same on every
machine and Python process, unlike Python's salted ``hash()``), so one partition can be
counted by one worker. A message holds one order (a JSON line, a basket line, or the CSV rows
of one order without a header), or ``--orders-per-message`` of them as NDJSON-style lines.

Publishing is pipelined: messages go out with a reply subject of their own and the stream's
acknowledgements are collected as they come, at most :data:`MAX_IN_FLIGHT` unanswered at a
time; a refused message (no stream for the subject, a full stream) stops the run with the
server's answer. ``--pace`` releases each order at its event time (relative to the first),
as in the file output; otherwise as fast as the server acknowledges.
"""

from __future__ import annotations

import argparse
import asyncio
import csv
import io
import json
import os
import sys
import time
import zlib
from collections.abc import Iterable
from dataclasses import dataclass
from typing import Any

from streamcount.errors import InputError, StreamcountError

__all__ = [
    "MAX_IN_FLIGHT",
    "PublishReport",
    "add_publish_options",
    "format_order",
    "partition_of",
    "publish_feed",
    "publish_main",
]

#: messages published and not yet acknowledged by the stream, at most
MAX_IN_FLIGHT = 4000
_ACK_TIMEOUT_SECONDS = 30.0
_PACE_FLUSH_SECONDS = 0.2  # with --pace, a partly filled message waits at most this long


def partition_of(order_id: str, partitions: int) -> int:
    """The partition of an order: CRC-32 of its id (UTF-8) modulo ``partitions``.

    >>> zlib.crc32(b"123456789") == 0xCBF43926  # CRC-32's published check value
    True
    >>> [partition_of(f"o-{i:06d}", 4) for i in range(1, 6)]
    [1, 3, 1, 2, 0]
    """
    return zlib.crc32(order_id.encode("utf-8")) % partitions


def format_order(fmt: str, oid: str, ts: float, basket: Iterable[str]) -> bytes:
    """One order as the lines ``generate`` writes in ``fmt`` (CSV: rows without a header),
    each ending in a newline."""
    if fmt == "jsonl":
        line = {"id": oid, "ts": round(ts, 3), "items": list(basket)}
        return (json.dumps(line, ensure_ascii=False) + "\n").encode("utf-8")
    if fmt == "basket":
        return (" ".join(basket) + "\n").encode("utf-8")
    out = io.StringIO()
    csv.writer(out, lineterminator="\n").writerows((oid, name, f"{ts:.3f}", 1) for name in basket)
    return out.getvalue().encode("utf-8")


@dataclass(frozen=True, slots=True)
class PublishReport:
    """What a run published: orders, messages, per-partition messages, seconds taken."""

    orders: int
    messages: int
    per_partition: tuple[int, ...]
    seconds: float


class _Acks:
    """The stream's acknowledgements of pipelined publishes."""

    def __init__(self) -> None:
        self.waiting = 0
        self.error: str | None = None
        self.room = asyncio.Event()
        self.room.set()

    async def on_ack(self, msg: Any) -> None:
        self.waiting -= 1
        if self.error is None:
            status = (msg.headers or {}).get("Status")
            if status == "503":
                self.error = (
                    "no stream captures the subject (503 no responders); create one, or pass "
                    "--stream NAME"
                )
            elif b'"error"' in msg.data[:20]:
                self.error = f"the server refused a message: {msg.data.decode(errors='replace')}"
        if self.waiting < MAX_IN_FLIGHT:
            self.room.set()


async def _quiet(exc: Exception) -> None:
    """nats-py logs every failed connection attempt with a traceback; the error that ends the
    attempts is reported once, as one line."""


async def _ensure_stream(js: Any, name: str, subject: str) -> None:
    import nats.js.errors
    from nats.js.api import RetentionPolicy, StorageType, StreamConfig

    try:
        await js.stream_info(name)
    except nats.js.errors.NotFoundError:
        wildcard = ".".join("*" if "{partition}" in t else t for t in subject.split("."))
        config = StreamConfig(
            name=name,
            subjects=[wildcard],
            storage=StorageType.FILE,
            retention=RetentionPolicy.LIMITS,
        )
        await js.add_stream(config)


async def _publish(
    records: Iterable[tuple[float, tuple[str, ...]]],
    *,
    url: str,
    subject: str,
    partitions: int,
    fmt: str,
    orders_per_message: int,
    pace: bool,
    stream: str | None,
    creds_file: str | None,
    token: str | None,
) -> PublishReport:
    import nats

    from streamcount.demo.generator import order_id

    options: dict[str, Any] = {
        "connect_timeout": 5,
        "allow_reconnect": False,
        # without these nats-py retries a refused first connection 60 times, 2 s apart
        "max_reconnect_attempts": 1,
        "reconnect_time_wait": 0.05,
        "error_cb": _quiet,
    }
    if creds_file:
        options["user_credentials"] = creds_file
    if token:
        options["token"] = token
    nc = await nats.connect(url, **options)
    started = time.perf_counter()
    acks = _Acks()
    sent = [0] * partitions
    buffers: list[list[bytes]] = [[] for _ in range(partitions)]
    counts = [0] * partitions
    subjects = [subject.format(partition=p) for p in range(partitions)]
    inbox = nc.new_inbox()
    await nc.subscribe(inbox + ".*", cb=acks.on_ack)
    number = 0

    async def flush(p: int) -> None:
        nonlocal number
        if not buffers[p]:
            return
        if acks.waiting >= MAX_IN_FLIGHT:
            acks.room.clear()
            await asyncio.wait_for(acks.room.wait(), _ACK_TIMEOUT_SECONDS)
        if acks.error is not None:
            raise InputError(f"--publish {url}: {acks.error}")
        number += 1
        acks.waiting += 1
        await nc.publish(subjects[p], b"".join(buffers[p]), reply=f"{inbox}.{number}")
        sent[p] += 1
        buffers[p], counts[p] = [], 0

    try:
        if stream:
            await _ensure_stream(nc.jetstream(), stream, subject)
        origin: tuple[float, float] | None = None
        last_flush = time.monotonic()
        orders = 0
        for index, (ts, basket) in enumerate(records):
            if pace:
                now = time.monotonic()
                if origin is None:
                    origin = (now, ts)
                delay = origin[0] + (ts - origin[1]) - now
                if delay > 0 or now - last_flush > _PACE_FLUSH_SECONDS:
                    for p in range(partitions):
                        await flush(p)
                    last_flush = now
                    if delay > 0:
                        await asyncio.sleep(delay)
            oid = order_id(index)
            p = partition_of(oid, partitions) if partitions > 1 else 0
            buffers[p].append(format_order(fmt, oid, ts, basket))
            counts[p] += 1
            orders += 1
            if counts[p] >= orders_per_message:
                await flush(p)
        for p in range(partitions):
            await flush(p)
        deadline = time.monotonic() + _ACK_TIMEOUT_SECONDS
        while acks.waiting > 0 and acks.error is None:
            if time.monotonic() > deadline:
                raise InputError(
                    f"--publish {url}: {acks.waiting} messages not acknowledged by the stream "
                    f"after {_ACK_TIMEOUT_SECONDS:g} s"
                )
            await nc.flush(timeout=5)
            await asyncio.sleep(0.01)
        if acks.error is not None:
            raise InputError(f"--publish {url}: {acks.error}")
    finally:
        await nc.close()
    return PublishReport(orders, sum(sent), tuple(sent), time.perf_counter() - started)


def publish_feed(
    records: Iterable[tuple[float, tuple[str, ...]]],
    *,
    url: str,
    subject: str = "orders.{partition}",
    partitions: int = 1,
    fmt: str = "jsonl",
    orders_per_message: int = 1,
    pace: bool = False,
    stream: str | None = None,
    creds_file: str | None = None,
    token: str | None = None,
) -> PublishReport:
    """Publish ``(ts, basket)`` records (order ids ``o-000001``... in order) to JetStream and
    wait until the stream has acknowledged every message.

    Raises
    ------
    ValueError
        ``partitions`` or ``orders_per_message`` below 1, or several partitions with a
        subject that has no ``{partition}``.
    InputError
        The server cannot be reached, or refused a message.
    """
    if partitions < 1 or orders_per_message < 1:
        raise ValueError("--partitions and --orders-per-message must be >= 1")
    if partitions > 1 and "{partition}" not in subject:
        raise ValueError(
            f"--subject {subject!r} has no {{partition}}, so {partitions} partitions would "
            "all go to one subject"
        )
    try:
        subject.format(partition=0)
    except (KeyError, IndexError, ValueError) as exc:
        raise ValueError(
            f"--subject {subject!r}: only {{partition}} may be replaced ({exc})"
        ) from None
    try:
        return asyncio.run(
            _publish(
                records,
                url=url,
                subject=subject,
                partitions=partitions,
                fmt=fmt,
                orders_per_message=orders_per_message,
                pace=pace,
                stream=stream,
                creds_file=creds_file,
                token=token,
            )
        )
    except StreamcountError:
        raise
    except (OSError, TimeoutError) as exc:
        raise InputError(f"--publish {url}: {exc or type(exc).__name__}") from None
    except Exception as exc:  # nats-py's own errors (no servers, refused stream)
        if type(exc).__module__.startswith("nats"):
            raise InputError(f"--publish {url}: {exc or type(exc).__name__}") from None
        raise


def add_publish_options(parser: argparse.ArgumentParser) -> None:
    """The ``--publish`` options of ``streamcount generate``."""
    group = parser.add_argument_group("publishing to NATS JetStream (instead of --output)")
    add = group.add_argument
    add("--publish", metavar="URL", help="publish to this NATS server (nats://HOST:PORT)")
    add(
        "--subject",
        default="orders.{partition}",
        help="subject of each message; {partition} is replaced (default orders.{partition})",
    )
    add("--partitions", type=int, default=1, help="partitions by CRC-32 of the order id")
    add(
        "--orders-per-message",
        type=int,
        default=1,
        metavar="N",
        help="orders per message, one per line (default 1)",
    )
    add("--stream", metavar="NAME", help="create this stream (file storage) if it is missing")
    add("--creds", metavar="FILE", help="NATS credentials file")
    add("--token-env", metavar="NAME", help="environment variable holding a NATS token")


def publish_main(args: argparse.Namespace, records: Iterable[Any]) -> int:
    """Publish ``records`` as ``args`` say; one summary line on stderr. 0, or 2 on error."""
    token = None
    if args.token_env:
        token = os.environ.get(args.token_env) or None
        if token is None:
            print(
                f"streamcount generate: error: --token-env {args.token_env}: that environment "
                "variable is not set or empty",
                file=sys.stderr,
            )
            return 2
    try:
        report = publish_feed(
            records,
            url=args.publish,
            subject=args.subject,
            partitions=args.partitions,
            fmt=args.format,
            orders_per_message=args.orders_per_message,
            pace=args.pace,
            stream=args.stream,
            creds_file=args.creds,
            token=token,
        )
    except (StreamcountError, ValueError) as exc:
        print(f"streamcount generate: error: {exc}", file=sys.stderr)
        return 2
    rate = report.orders / report.seconds if report.seconds > 0 else float("inf")
    print(
        f"published {report.orders} orders in {report.messages} messages to {args.publish} "
        f"({', '.join(map(str, report.per_partition))} messages per partition) in "
        f"{report.seconds:.2f} s: {rate:,.0f} orders/s",
        file=sys.stderr,
    )
    return 0
