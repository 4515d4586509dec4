"""Checkpoints of the counting state: a versioned, checksummed file written atomically.

No pickle: a checkpoint holds a JSON manifest and raw numpy array bytes, so loading one can
never run code, and a file from another version or other settings is refused with a message.

File layout (``checkpoint-<10-digit counter>.sc``; integers little-endian)::

    offset  size  content
    0       7     magic bytes b"SCCKPT\\n"
    7       4     format version, uint32 (currently 1)
    11      8     manifest length M in bytes, uint64
    19      M     manifest, UTF-8 JSON padded with spaces so that 19+M is a multiple of 8:
                    {"format_version": 1, "created_at": <unix seconds>,
                     "fingerprint": "<sha256 hex of the counting settings>",
                     "settings": {...} or null,  # the fingerprinted settings, for messages
                     "meta": {...},              # the caller's JSON-able state
                     "arrays": [{"name", "dtype", "shape", "offset", "length"}, ...]}
    19+M    D     array bytes, C order, one after another; each array's ``offset`` is counted
                  from the start of this section; each array is zero-padded to a multiple of 8
    19+M+D  32    SHA-256 of every byte before it

``dtype`` is numpy's ``dtype.str`` (``"<i8"``, ``"|u1"``, ``"<U5"``), so byte order is
explicit; arrays that hold Python objects are refused.

Writing: the bytes go to a temporary file in the same directory, which is fsynced, renamed over
the final name with ``os.replace`` (atomic on POSIX) and the directory is fsynced, so a crash
leaves either the old set of checkpoints or the old set plus a complete new one (and perhaps a
stray ``.tmp`` file, which loading ignores). Older checkpoints beyond ``keep`` are deleted only
after the new one is durable.

Examples
--------
>>> import tempfile
>>> import numpy as np
>>> tmp = tempfile.TemporaryDirectory()
>>> d = tmp.name
>>> path = save_checkpoint(d, meta={"next_seq": 7}, arrays={"count": np.arange(3)},
...                        fingerprint="f00d")
>>> path.name
'checkpoint-0000000001.sc'
>>> meta, arrays = load_latest_checkpoint(d, fingerprint="f00d")
>>> meta, arrays["count"].tolist()
({'next_seq': 7}, [0, 1, 2])
>>> tmp.cleanup()
"""

from __future__ import annotations

import hashlib
import json
import logging
import math
import os
import re
import struct
import tempfile
import time
from collections.abc import Mapping
from pathlib import Path
from typing import Any

import numpy as np

from streamcount.errors import CheckpointError

__all__ = [
    "FORMAT_VERSION",
    "MAGIC",
    "list_checkpoints",
    "load_checkpoint",
    "load_latest_checkpoint",
    "save_checkpoint",
]

logger = logging.getLogger(__name__)

MAGIC = b"SCCKPT\n"
FORMAT_VERSION = 1
_HEADER = struct.Struct("<IQ")  # format version, manifest length
_PREFIX = len(MAGIC) + _HEADER.size
_DIGEST = 32
_ALIGN = 8
_NAME = re.compile(r"checkpoint-(\d{10,})\.sc\Z")
#: numpy kinds stored as raw bytes: bool, ints, floats, complex, bytes, str, datetimes
_KINDS = frozenset("biufcSUmM")


def _counter(path: Path) -> int:
    match = _NAME.match(path.name)
    assert match is not None, path
    return int(match.group(1))


def list_checkpoints(directory: str | Path) -> list[Path]:
    """Checkpoint files in ``directory``, oldest first (by their counter)."""
    directory = Path(directory)
    if not directory.is_dir():
        return []
    found = []
    for entry in directory.iterdir():
        if _NAME.match(entry.name) and entry.is_file():
            found.append((_counter(entry), entry))
    return [path for _, path in sorted(found)]


def _encode(
    *,
    meta: Mapping[str, Any],
    arrays: Mapping[str, np.ndarray],
    fingerprint: str,
    settings: Mapping[str, Any] | None,
    created_at: float,
) -> bytes:
    directory = []
    blobs: list[bytes] = []
    offset = 0
    for name, value in arrays.items():
        arr = np.asarray(value, order="C")  # (ascontiguousarray would make 0-d arrays 1-d)
        if arr.dtype.hasobject or arr.dtype.kind not in _KINDS or arr.dtype.fields:
            raise CheckpointError(
                f"array {name!r} has dtype {arr.dtype!s}; checkpoints hold plain numeric, "
                "bytes or str arrays only (no Python objects, no records)"
            )
        data = arr.tobytes()
        pad = -len(data) % _ALIGN
        directory.append(
            {
                "name": name,
                "dtype": arr.dtype.str,
                "shape": list(arr.shape),
                "offset": offset,
                "length": len(data),
            }
        )
        blobs.append(data + b"\0" * pad)
        offset += len(data) + pad
    manifest = {
        "format_version": FORMAT_VERSION,
        "created_at": created_at,
        "fingerprint": fingerprint,
        "settings": dict(settings) if settings is not None else None,
        "meta": dict(meta),
        "arrays": directory,
    }
    try:
        text = json.dumps(manifest, allow_nan=False, separators=(",", ":"))
    except (TypeError, ValueError) as exc:
        raise CheckpointError(
            f"checkpoint meta cannot be written as JSON ({exc}); use plain dicts, lists, "
            "strings and finite numbers"
        ) from exc
    encoded = text.encode("utf-8")
    # pad the manifest with JSON whitespace so the array section starts 8-byte aligned
    encoded += b" " * (-(_PREFIX + len(encoded)) % _ALIGN)
    head = MAGIC + _HEADER.pack(FORMAT_VERSION, len(encoded))
    body = head + encoded + b"".join(blobs)
    return body + hashlib.sha256(body).digest()


def _fsync_directory(directory: Path) -> None:
    try:
        fd = os.open(directory, os.O_RDONLY)
    except OSError:  # pragma: no cover - platforms without directory handles (Windows)
        return
    try:
        os.fsync(fd)
    finally:
        os.close(fd)


def save_checkpoint(
    directory: str | Path,
    *,
    meta: Mapping[str, Any],
    arrays: Mapping[str, np.ndarray],
    fingerprint: str,
    keep: int = 2,
    settings: Mapping[str, Any] | None = None,
    created_at: float | None = None,
) -> Path:
    """Write a new checkpoint atomically and prune old ones.

    Parameters
    ----------
    directory:
        Created if missing. One writer per directory.
    meta:
        JSON-able state (no NaN or infinity).
    arrays:
        Named arrays (any shape, including empty); copied as raw bytes.
    fingerprint:
        :func:`streamcount.config.describe.fingerprint` of the settings that shaped the state.
    keep:
        Checkpoints to keep, the new one included (>= 1).
    settings:
        The fingerprinted settings themselves (``config.describe.fingerprint_settings``); stored so
        a later mismatch can name the settings that changed.
    created_at:
        Unix time recorded in the manifest (default: now).

    Returns
    -------
    Path
        The new checkpoint file.

    Raises
    ------
    CheckpointError
        For an array holding objects or meta that is not JSON.
    OSError
        When the file cannot be written; no partial checkpoint is left under a final name.
    """
    if keep < 1:
        raise ValueError(f"keep={keep!r} must be >= 1 (the new checkpoint itself)")
    directory = Path(directory)
    data = _encode(
        meta=meta,
        arrays=arrays,
        fingerprint=fingerprint,
        settings=settings,
        created_at=time.time() if created_at is None else created_at,
    )
    directory.mkdir(parents=True, exist_ok=True)
    existing = list_checkpoints(directory)
    counter = _counter(existing[-1]) + 1 if existing else 1
    target = directory / f"checkpoint-{counter:010d}.sc"
    fd, tmp_name = tempfile.mkstemp(dir=directory, prefix=".checkpoint-", suffix=".sc.tmp")
    tmp = Path(tmp_name)
    try:
        with os.fdopen(fd, "wb") as fh:
            fh.write(data)
            fh.flush()
            os.fsync(fh.fileno())
        os.replace(tmp, target)
    except BaseException:
        tmp.unlink(missing_ok=True)
        raise
    _fsync_directory(directory)
    # only now, with the new file durable, remove what it supersedes
    for old in list_checkpoints(directory)[:-keep]:
        old.unlink(missing_ok=True)
    for stray in directory.glob(".checkpoint-*.sc.tmp"):
        stray.unlink(missing_ok=True)  # left by a crash between write and rename
    logger.debug("checkpoint saved to %s (%d bytes)", target, len(data))
    return target


def _damaged(path: Path, what: str, older: list[Path]) -> CheckpointError:
    hint = (
        f"; an older checkpoint {older[-1].name} exists: move {path.name} aside to resume "
        "from it, or start with --fresh"
        if older
        else "; start with --fresh to discard it"
    )
    return CheckpointError(f"checkpoint {path} is damaged: {what}{hint}")


def load_checkpoint(
    path: str | Path,
    *,
    fingerprint: str,
    settings: Mapping[str, Any] | None = None,
) -> tuple[dict[str, Any], dict[str, np.ndarray]]:
    """Read one checkpoint file, verifying magic, version, length, checksum and fingerprint.

    Returns ``(meta, arrays)``; the arrays are writable and share one buffer.

    Raises
    ------
    CheckpointError
        Naming the file and what is wrong with it. Nothing on disk is changed.
    """
    return _load(Path(path), fingerprint, settings, older=[])


def _load(
    path: Path, fingerprint: str, settings: Mapping[str, Any] | None, *, older: list[Path]
) -> tuple[dict[str, Any], dict[str, np.ndarray]]:
    buf = bytearray(path.read_bytes())
    if len(buf) < _PREFIX:
        if not MAGIC.startswith(bytes(buf[: len(MAGIC)])):
            raise _damaged(path, "it is not a streamcount checkpoint (wrong magic bytes)", older)
        raise _damaged(path, f"truncated to {len(buf)} bytes", older)
    if bytes(buf[: len(MAGIC)]) != MAGIC:
        raise _damaged(path, "it is not a streamcount checkpoint (wrong magic bytes)", older)
    version, manifest_len = _HEADER.unpack_from(buf, len(MAGIC))
    if version != FORMAT_VERSION:
        raise CheckpointError(
            f"checkpoint {path} has format version {version}; this streamcount reads version "
            f"{FORMAT_VERSION}; start with --fresh to discard it, or run the streamcount "
            "version that wrote it"
        )
    data_start = _PREFIX + manifest_len
    if len(buf) < data_start + _DIGEST:
        raise _damaged(path, f"truncated to {len(buf)} bytes (inside the manifest)", older)
    try:
        manifest = json.loads(bytes(buf[_PREFIX:data_start]).decode("utf-8"))
        entries = manifest["arrays"]
        data_len = max((e["offset"] + e["length"] for e in entries), default=0)
        data_len += -data_len % _ALIGN
    except (ValueError, KeyError, TypeError) as exc:
        raise _damaged(path, f"the manifest cannot be read ({exc})", older) from exc
    expected = data_start + data_len + _DIGEST
    if len(buf) < expected:
        raise _damaged(path, f"truncated to {len(buf)} bytes of {expected}", older)
    if len(buf) > expected:
        raise _damaged(path, f"{len(buf) - expected} unexpected bytes after the end", older)
    digest = hashlib.sha256(memoryview(buf)[: expected - _DIGEST]).digest()
    if digest != bytes(buf[expected - _DIGEST :]):
        raise _damaged(path, "checksum mismatch (a byte changed on disk)", older)
    if manifest.get("fingerprint") != fingerprint:
        raise CheckpointError(
            f"checkpoint {path} was written with other settings "
            f"({_settings_difference(manifest.get('settings'), settings, manifest, fingerprint)})"
            "; start with --fresh to discard it, or restore the settings"
        )
    arrays: dict[str, np.ndarray] = {}
    for entry in entries:
        dtype = np.dtype(entry["dtype"])
        shape = tuple(entry["shape"])
        count = math.prod(shape)
        if count * dtype.itemsize != entry["length"]:
            raise _damaged(path, f"array {entry['name']!r} has an inconsistent size", older)
        if count == 0:
            arrays[entry["name"]] = np.zeros(shape, dtype=dtype)
            continue
        start = data_start + entry["offset"]
        arrays[entry["name"]] = np.frombuffer(buf, dtype=dtype, count=count, offset=start).reshape(
            shape
        )
    logger.debug("checkpoint read from %s", path)
    return manifest["meta"], arrays


def _settings_difference(
    stored: Any, current: Mapping[str, Any] | None, manifest: Mapping[str, Any], fingerprint: str
) -> str:
    if isinstance(stored, Mapping) and current is not None:
        changed = [
            f"{key}: {stored.get(key)!r} then, {current.get(key)!r} now"
            for key in sorted(set(stored) | set(current))
            if stored.get(key) != current.get(key)
        ]
        if changed:
            return "; ".join(changed)
    return (
        f"settings fingerprint {str(manifest.get('fingerprint'))[:12]}..., "
        f"now {fingerprint[:12]}..."
    )


def load_latest_checkpoint(
    directory: str | Path,
    *,
    fingerprint: str,
    settings: Mapping[str, Any] | None = None,
) -> tuple[dict[str, Any], dict[str, np.ndarray]] | None:
    """Load the newest checkpoint in ``directory``; ``None`` when there is none.

    Parameters
    ----------
    fingerprint:
        Fingerprint of the current settings; a checkpoint written under others is refused.
    settings:
        The current fingerprinted settings, so a refusal can name what changed.

    Raises
    ------
    CheckpointError
        The newest checkpoint is truncated, damaged, of another format version or written
        under other settings. It is never deleted or overwritten here, and no older checkpoint
        is used silently in its place: the message says how to proceed.
    """
    found = list_checkpoints(directory)
    if not found:
        return None
    return _load(found[-1], fingerprint, settings, older=found[:-1])
