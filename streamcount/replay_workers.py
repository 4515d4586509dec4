"""``streamcount replay --workers N``: whole panes counted in worker processes, assembled in
order into one pipeline, so the report, the rules and the alerts are exactly those of a replay
in one process.

How (a plain file of basket lines or JSON lines, count-based window)::

    parent: cut the file into parts just after the last newline of a 1 MB block
            (the blocks one process reads in: every batch falls in one part)
    worker: decode its part batch by batch (the same decoder), apply the engine's guards,
            intern the accepted items with its own vocabulary      -> accepted per batch
    parent: prefix sums: the sequence number each part starts at   -> tell the worker
    worker: count the whole panes inside its part with an engine of the same settings
            (sequence numbers from the part's first pane boundary)  -> each pane by item
            names (streamcount.engine.wire), the transactions before its first and after
            its last pane boundary as they are, and what its open pane held at each batch end
    parent: part by part, batch by batch, in order: intern the batch's new names, add the
            loose transactions (Engine.add_ids), hand over the whole panes
            (Engine.add_counted_pane); rules and alerts run at every pane close as usual

Pane boundaries count accepted transactions, so they are known only after decoding: parts are
cut by bytes for decoding and by sequence numbers for counting, never by hashing. A batch
counted in one process is counted the same way in a worker (batches are cut by position in
the pane), and the vocabulary follows the one-process run exactly: names are interned batch
by batch in order of first appearance, and the vocabulary is compacted at the same batch ends
with the same names in use (the workers report what their open pane held there), so item ids,
and with them every tie order, are the same.

What stays in one process (and why): standard input, pipes and compressed files (they cannot
be split by offset; there is no decode-ahead pipeline for them in this version), CSV orders
(an order's rows span lines, and open orders carry state from part to part) and time-based
windows (panes follow event times and the lateness rule follows the watermark of everything
before), and item filters, renames or a catalogue (the mapping and its counters live in one
engine). :func:`plan` says which applies.

Memory: a worker holds the decoded ids of at most two parts (a part is about a quarter of the
file per worker, at most ``MAX_PART_BYTES``); the parent holds the finished parts not yet
assembled.
"""

from __future__ import annotations

import ctypes
import ctypes.util
import gc
import multiprocessing
import os
import pickle
import queue
import resource
import stat
import threading
import time
import traceback
from collections import Counter
from collections.abc import Callable
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from streamcount.catalogue.state import catalogue_configured
from streamcount.config.settings import Config
from streamcount.engine.engine import Engine
from streamcount.engine.rows import sort_dedupe
from streamcount.engine.vocab import ItemVocabulary
from streamcount.engine.wire import PaneMeta, decode_pane, encode_pane
from streamcount.intake import bulk
from streamcount.intake.bulk import iter_batches, part_starts
from streamcount.intake.formats import FORMATS, make_decoder
from streamcount.pipeline import Pipeline

__all__ = ["MAX_PART_BYTES", "MAX_WORKERS", "Plan", "default_workers", "plan", "run_parts"]

#: the default number of workers is the number of cores, at most this
MAX_WORKERS = 8
#: largest part a worker decodes at once (its decoded ids are held until counted)
MAX_PART_BYTES = 32 << 20
#: parts per worker when the file is small enough (more parts: the parent starts earlier;
#: fewer: fewer panes cut by a part boundary, which the parent counts itself)
_PARTS_PER_WORKER = 4
#: parts a worker has in hand at once (decoded and waiting, or queued)
_AHEAD = 2


def default_workers() -> int:
    """The number of cores this process may use, at most :data:`MAX_WORKERS`."""
    try:
        cores = len(os.sched_getaffinity(0))
    except AttributeError:  # not Linux
        cores = os.cpu_count() or 1
    return max(1, min(cores, MAX_WORKERS))


@dataclass(frozen=True, slots=True)
class Plan:
    """How a replay runs: byte offsets where the parts start (one process when fewer than
    two), and why it runs in one process when it does."""

    starts: list[int]
    size: int
    workers: int
    why_one_process: str | None = None
    #: the block grid of the reading (one process reads in the same blocks)
    block_bytes: int = 1 << 20

    @property
    def parallel(self) -> bool:
        return self.why_one_process is None


def plan(path: str, config: Config, workers: int) -> Plan:
    """Whether and how ``path`` can be replayed by ``workers`` processes."""

    def one(why: str) -> Plan:
        return Plan([0], 0, 1, why)

    if workers <= 1:
        return one("one worker asked for")
    if path == "-":
        return one("standard input cannot be split by offset")
    if config.engine.window_seconds is not None:
        return one("a time-based window follows event times across the whole input")
    if catalogue_configured(config.items):
        return one("items.ignore / allow / rename or a catalogue map items in one process")
    spec = FORMATS.get(config.input.format)
    if spec is None or not spec.stateless:
        return one(f"{config.input.format} records span lines (open orders carry state)")
    try:
        if not stat.S_ISREG(os.stat(path).st_mode):
            return one("a pipe or device cannot be split by offset")
        with open(path, "rb") as fh:
            if fh.read(2) == b"\x1f\x8b":
                return one("a compressed file cannot be split by offset")
            size = os.fstat(fh.fileno()).st_size
    except OSError:
        return one("the input cannot be opened")  # replay_file reports the error itself
    parts = workers * _PARTS_PER_WORKER
    parts = max(parts, -(-size // MAX_PART_BYTES))
    block = bulk.BLOCK_BYTES  # read at call time, as decode_file reads it
    starts = part_starts(path, size, parts, block)
    if len(starts) < 2:
        return one("the file is too small to split")
    return Plan(starts, size, workers, None, block)


# ---------------------------------------------------------------------------------------------
# worker side


@dataclass(slots=True)
class _Part:
    """A decoded part held by a worker until its first sequence number is known."""

    vocab: ItemVocabulary
    flat: np.ndarray  # local ids, ascending and distinct per transaction
    lengths: np.ndarray
    ts: np.ndarray  # float, NaN where none
    batch_sizes: list[int]  # accepted transactions per batch (batches with none left out)
    first_seen: list[np.ndarray]  # per batch: local ids in order of first appearance in it


def _peak_rss_mb() -> float:
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024


def _decode_part(
    path: str, config: Config, start: int, stop: int, block: int
) -> tuple[_Part, Counter[str], Counter[str]]:
    decoder = make_decoder(config.input, config.engine.max_basket_items, require_ts=False)
    guard = Engine(config.engine)
    vocab = ItemVocabulary()
    flats, lengths_all, ts_all, sizes, seen = [], [], [], [], []
    decoded_reasons: Counter[str] = Counter()
    engine_reasons: Counter[str] = Counter()
    batches = iter_batches(
        path,
        max_record_bytes=config.input.max_record_bytes,
        block_bytes=block,
        start=start,
        stop=stop,
    )
    for batch in batches:
        decoded = decoder.decode(batch)
        decoded_reasons.update(e.reason for e in decoded.errors)
        if not len(decoded):
            continue
        tokens = decoded.tokens
        if tokens is not None:  # interned in bulk, as the one-process pipeline does
            keep, rejections = guard.screen_distinct(tokens.lengths, decoded.ts)
        else:
            keep, rejections = guard.screen(decoded.baskets, decoded.ts)
        engine_reasons.update(r.reason for r in rejections)
        if not keep.shape[0]:
            continue
        if tokens is not None:
            if keep.shape[0] != len(tokens):
                mask = np.zeros(len(tokens), dtype=bool)
                mask[keep] = True
                tokens = tokens.select(mask)
            raw = vocab.encode_table(tokens.names, tokens.codes)[tokens.codes]
            lengths = tokens.lengths
        else:
            baskets = decoded.baskets
            kept = baskets if keep.shape[0] == len(baskets) else [baskets[i] for i in keep.tolist()]
            raw, lengths = vocab.encode_baskets(kept)
        seen.append(_first_appearance(raw, len(vocab)))
        flat, lengths = sort_dedupe(raw, lengths, len(vocab))
        ts = np.full(keep.shape[0], np.nan)
        if decoded.ts is not None:
            ts = np.array(decoded.ts, dtype=np.float64)[keep]
        flats.append(flat)
        lengths_all.append(lengths)
        ts_all.append(ts)
        sizes.append(int(keep.shape[0]))
    part = _Part(
        vocab,
        np.concatenate(flats) if flats else np.zeros(0, dtype=np.int32),
        np.concatenate(lengths_all) if lengths_all else np.zeros(0, dtype=np.int64),
        np.concatenate(ts_all) if ts_all else np.zeros(0),
        sizes,
        seen,
    )
    return part, decoded_reasons, engine_reasons


def _first_appearance(ids: np.ndarray, size: int) -> np.ndarray:
    """The distinct ``ids`` (below ``size``) in order of first appearance: a stable radix
    sort by 16-bit digits, the first of each run, those positions in order.

    >>> _first_appearance(np.array([5, 2, 5, 7, 2, 0]), 8).tolist()
    [5, 2, 7, 0]
    """
    if not ids.shape[0]:
        return ids
    perm = np.arange(ids.shape[0])
    keys = ids
    for shift in range(0, max(int(size - 1).bit_length(), 1), 16):
        step = np.argsort(((keys >> shift) & 0xFFFF).astype(np.uint16), kind="stable")
        perm, keys = perm[step], keys[step]
    runs = np.flatnonzero(np.concatenate(([True], keys[1:] != keys[:-1])))
    return ids[np.sort(perm[runs])]


def _rows(part: _Part, lo: int, hi: int, ends: np.ndarray) -> tuple[np.ndarray, ...]:
    """Transactions ``lo..hi-1`` of a part (CSR pieces and times)."""
    a = int(ends[lo - 1]) if lo else 0
    b = int(ends[hi - 1]) if hi else 0
    return part.flat[a:b], part.lengths[lo:hi], part.ts[lo:hi]


def _count_part(part: _Part, config: Config, first_seq: int, name: str) -> dict[str, Any]:
    """Count the whole panes of a decoded part that starts at ``first_seq``."""
    size = int(config.engine.pane_size)
    n = int(part.lengths.shape[0])
    ends = np.cumsum(part.lengths)
    # local positions of the first and past the last whole pane
    lo = (-(first_seq - 1)) % size
    hi = lo + ((n - lo) // size) * size if n > lo else lo
    panes: list[bytes] = []
    checks: dict[int, tuple[bool, np.ndarray]] = {}
    if hi > lo:
        engine = Engine(config.engine)
        engine.vocabulary = part.vocab
        engine.auto_compact = False  # the parent decides, for the whole replay
        engine.start_at(first_seq + lo)

        def ship(eng: Engine) -> None:
            pane = eng.last_closed
            assert pane is not None
            meta = PaneMeta(
                pane.index,
                pane.summary.n,
                eng.epsilon,
                eng.max_itemset_size,
                "",
                "",
                pane.min_ts,
                pane.max_ts,
                name,
            )
            panes.append(encode_pane(pane.summary, eng.vocabulary.names, meta))

        engine.on_pane_closed = ship
        # feed up to each batch end inside the whole panes, noting what the open pane holds
        cuts = [c for c in np.cumsum(part.batch_sizes).tolist() if lo < c < hi]
        pos = lo
        for cut in [*cuts, hi]:
            engine.add_ids(*_rows(part, pos, cut, ends))
            pos = cut
            if cut == hi or (cut - lo) % size == 0:
                continue
            pane = engine.window.panes[(first_seq + cut - 2) // size]
            used = np.zeros(len(part.vocab), dtype=bool)
            pane.ids_in_use(used)
            checks[first_seq + cut - 1] = (pane.counted > 0, np.flatnonzero(used))
    return {
        "names": list(part.vocab.names),
        "first_seen": part.first_seen,
        "batch_sizes": part.batch_sizes,
        "head": _rows(part, 0, lo if hi > lo else n, ends),
        "panes": panes,
        "tail": _rows(part, hi, n, ends) if hi > lo else _rows(part, n, n, ends),
        "whole": (first_seq + lo, first_seq + hi - 1) if hi > lo else None,
        "checks": checks,
        "rss": _peak_rss_mb(),
    }


def _keep_freed_memory() -> None:
    """glibc only: keep freed blocks for reuse rather than handing them back to the system
    and faulting fresh pages in for the next array (measured on the benchmark: a worker's
    page faults fall by half and its system time with them). Elsewhere nothing changes."""
    try:
        libc = ctypes.CDLL(ctypes.util.find_library("c") or "libc.so.6")
        mallopt = libc.mallopt
    except (OSError, AttributeError):
        return
    trim_threshold, top_pad, mmap_threshold = -1, -2, -3  # glibc's M_* parameter numbers
    mallopt(mmap_threshold, 64 << 20)
    mallopt(trim_threshold, 128 << 20)
    mallopt(top_pad, 16 << 20)


def _worker(path: str, config: Config, tasks: Any, results: Any, name: str) -> None:
    """A worker's loop: ``("decode", r, start, stop)`` and ``("count", r, first_seq)`` tasks
    in order, ``None`` to stop; every answer goes to ``results`` tagged with ``r``."""
    gc.disable()  # short-lived acyclic lists, as in one process
    _keep_freed_memory()
    held: dict[int, _Part] = {}
    r = -1
    try:
        while (task := tasks.get()) is not None:
            kind, r = task[0], task[1]
            started = time.process_time()
            if kind == "decode":
                part, decoded, engine_side = _decode_part(path, config, *task[2:5])
                held[r] = part
                cpu = time.process_time() - started
                results.put(("decoded", r, part.batch_sizes, decoded, engine_side, cpu))
            else:
                done = _count_part(held.pop(r), config, task[2], name)
                done["cpu"] = time.process_time() - started
                results.put(("counted", r, done))
    except BaseException as exc:  # report everything; the parent decides
        try:
            pickle.dumps(exc)
            err: BaseException = exc
        except Exception:
            err = RuntimeError(f"{type(exc).__name__}: {exc}")
        results.put(("error", r, err, traceback.format_exc()))


# ---------------------------------------------------------------------------------------------
# parent side


@dataclass(slots=True)
class _Assembly:
    """The parent's bookkeeping: which parts are decoded, counted and assembled."""

    parts: int
    batch_sizes: dict[int, list[int]] = field(default_factory=dict)
    first_seq: dict[int, int] = field(default_factory=dict)
    counted: dict[int, dict[str, Any]] = field(default_factory=dict)
    next_start: int = 0  # the next part whose first sequence number is to be sent
    next_seq: int = 1
    next_assembled: int = 0
    rss: float = 0.0
    cpu_decode: float = 0.0
    cpu_count: float = 0.0


def _context() -> Any:
    """``fork`` where it is safe (Linux, no other thread), else ``spawn``."""
    methods = multiprocessing.get_all_start_methods()
    method = "fork" if "fork" in methods and threading.active_count() == 1 else "spawn"
    return multiprocessing.get_context(method)


def run_parts(
    path: str,
    config: Config,
    the_plan: Plan,
    pipeline: Pipeline,
    progress: Callable[[int], None] | None = None,
) -> dict[str, Any]:
    """Replay ``path`` into ``pipeline`` with the plan's workers; returns statistics (workers,
    parts, the largest worker's peak RSS in MB). The pipeline ends exactly as after adding
    every decoded batch of the file in one process (without a flush)."""
    ctx = _context()
    workers = the_plan.workers
    bounds = [*the_plan.starts, the_plan.size]
    n_parts = len(the_plan.starts)
    results = ctx.Queue()
    tasks = [ctx.Queue() for _ in range(workers)]
    procs = [
        ctx.Process(
            target=_worker,
            args=(path, config, tasks[w], results, f"replay-worker-{w}"),
            name=f"streamcount-replay-{w}",
            daemon=True,
        )
        for w in range(workers)
    ]
    state = _Assembly(n_parts)
    sent = [0] * workers  # parts handed to each worker so far (worker w takes r = w, w + N...)
    engine = pipeline.engine
    engine.auto_compact = False

    def send_decode(w: int) -> None:
        r = w + sent[w] * workers
        if r < n_parts:
            tasks[w].put(("decode", r, bounds[r], bounds[r + 1], the_plan.block_bytes))
            sent[w] += 1

    try:
        for p in procs:
            p.start()
        for w in range(workers):
            for _ in range(_AHEAD):
                send_decode(w)
        while state.next_assembled < n_parts:
            msg = _next_message(results, procs)
            kind, r = msg[0], msg[1]
            if kind == "error":
                err = msg[2]
                err.add_note(f"in a replay worker:\n{msg[3]}")
                raise err
            if kind == "decoded":
                state.cpu_decode += msg[5]
                state.batch_sizes[r] = msg[2]
                pipeline.rejected_counts.update(msg[3])
                pipeline.rejected_counts.update(msg[4])
                engine.rejected.update(msg[4])
                while state.next_start in state.batch_sizes:
                    q = state.next_start
                    state.first_seq[q] = state.next_seq
                    tasks[q % workers].put(("count", q, state.next_seq))
                    state.next_seq += sum(state.batch_sizes[q])
                    state.next_start += 1
            else:
                state.counted[r] = msg[2]
                state.rss = max(state.rss, float(msg[2]["rss"]))
                state.cpu_count += msg[2]["cpu"]
                send_decode(r % workers)
                while state.next_assembled in state.counted:
                    q = state.next_assembled
                    _assemble(pipeline, state.counted.pop(q), state.first_seq[q])
                    state.next_assembled += 1
                    if progress is not None:
                        progress(engine.transactions_seen)
        for t in tasks:
            t.put(None)
        for p in procs:
            p.join(timeout=30)
    finally:
        for p in procs:
            if p.is_alive():
                p.terminate()
                p.join(timeout=5)
        engine.auto_compact = True
    return {
        "workers": workers,
        "parts": n_parts,
        "worker_peak_rss_mb": state.rss,
        "worker_cpu_seconds": {"decode": state.cpu_decode, "count": state.cpu_count},
    }


def _next_message(results: Any, procs: list[Any]) -> tuple[Any, ...]:
    """The next answer of any worker; a worker that died without one is an error."""
    while True:
        try:
            return results.get(timeout=1.0)
        except queue.Empty:
            for p in procs:
                if not p.is_alive() and p.exitcode not in (0, None):
                    raise RuntimeError(
                        f"replay worker {p.name} exited with code {p.exitcode}"
                    ) from None


def _assemble(pipeline: Pipeline, done: dict[str, Any], first_seq: int) -> None:
    """Add one counted part to the pipeline, batch by batch, exactly as one process would
    have added its batches."""
    engine = pipeline.engine
    names: list[str] = done["names"]
    size = int(engine.pane_size or 0)
    whole = done["whole"]
    panes = iter(done["panes"])
    loose = [done["head"], done["tail"]]
    loose_at = [first_seq, (whole[1] + 1) if whole else first_seq]
    batch_end = first_seq - 1
    for n_batch, seen in zip(done["batch_sizes"], done["first_seen"], strict=True):
        batch_end += n_batch
        engine.vocabulary.encode_flat([names[i] for i in seen.tolist()])
        closes = 0
        while engine.next_seq <= batch_end:
            seq = engine.next_seq
            if whole and whole[0] <= seq <= whole[1]:
                if seq + size - 1 > batch_end:  # the pane closes in a later batch
                    break
                meta, levels, pane_names = decode_pane(next(panes))
                known = len(engine.vocabulary)
                engine.add_counted_pane(
                    levels, pane_names, meta.transactions, min_ts=meta.start, max_ts=meta.end
                )
                assert len(engine.vocabulary) == known, "a pane named an item not interned"
                closes += 1
                continue
            which = 0 if whole is None or seq < whole[0] else 1
            stop = batch_end if which == 1 or whole is None else min(batch_end, whole[0] - 1)
            closes += _add_loose(engine, names, loose[which], loose_at[which], seq, stop)
        if closes:
            _compact_as_one_process(engine, names, done["checks"].get(batch_end))


def _add_loose(
    engine: Engine, names: list[str], rows: tuple[np.ndarray, ...], at: int, lo: int, hi: int
) -> int:
    """Add the loose transactions with sequence numbers ``lo..hi`` (``rows`` start at ``at``)."""
    flat, lengths, ts = rows
    ends = np.cumsum(lengths)
    i, j = lo - at, hi - at + 1
    a = int(ends[i - 1]) if i else 0
    b = int(ends[j - 1]) if j else 0
    local = flat[a:b]
    table = np.full(len(names), -1, dtype=np.int64)
    used = np.unique(local)
    table[used] = _interned(engine, [names[k] for k in used.tolist()])
    return engine.add_ids(table[local], lengths[i:j], ts[i:j]).panes_closed


def _interned(engine: Engine, names: list[str]) -> np.ndarray:
    """The engine's ids of names it has interned (all of them must be)."""
    ids = np.empty(len(names), dtype=np.int64)
    for i, name in enumerate(names):
        item = engine.vocabulary.get(name)
        if item is None:
            raise AssertionError(f"replay workers: {name!r} was not interned before use")
        ids[i] = item
    return ids


def _compact_as_one_process(
    engine: Engine, names: list[str], check: tuple[bool, np.ndarray] | None
) -> None:
    """The vocabulary compaction one process does at the end of a batch that closed a pane,
    with the names it would hold then: the panes held here, and when the open pane is being
    counted by a worker, what the worker reported it held (its panes before the window's
    start already gone if it had counted a batch)."""
    vocab = engine.vocabulary
    used = np.zeros(len(vocab), dtype=bool)
    window = engine.window
    if check is None:
        used = window.ids_in_use(len(vocab))
    else:
        counted_any, local_ids = check
        newest = (engine.next_seq - 1) // int(engine.pane_size or 1)  # the open pane
        if not counted_any:
            newest = window.newest_index
        oldest = newest - engine.window_panes + 1
        for idx, pane in window.panes.items():
            if idx >= oldest:
                pane.ids_in_use(used)
        used[_interned(engine, [names[k] for k in local_ids.tolist()])] = True
    engine.compact_vocabulary(used=used)
