"""Ending the event loops that the service's client threads own.

The NATS source, the cluster's summary publisher and the HTTP server each run an asyncio loop
on a thread of their own. When such a loop stops, tasks a library started (nats-py starts one
per subscription) may not have run yet; closing the loop over them would leave coroutines
never awaited, which Python reports as an unraisable warning at some later garbage
collection. :func:`close_loop` cancels them, lets them finish, then closes the loop.
"""

from __future__ import annotations

import asyncio
import contextlib

__all__ = ["close_loop"]


def close_loop(loop: asyncio.AbstractEventLoop) -> None:
    """Cancel the tasks still pending on ``loop`` (stopped, not running), run them to their
    end, shut its async generators down and close it; never raises.

    >>> loop = asyncio.new_event_loop()
    >>> task = loop.create_task(asyncio.sleep(60))
    >>> close_loop(loop)
    >>> task.cancelled(), loop.is_closed()
    (True, True)
    """
    with contextlib.suppress(Exception):
        pending = [t for t in asyncio.all_tasks(loop) if not t.done()]
        for task in pending:
            task.cancel()
        if pending:
            loop.run_until_complete(asyncio.gather(*pending, return_exceptions=True))
        loop.run_until_complete(loop.shutdown_asyncgens())
    loop.close()
