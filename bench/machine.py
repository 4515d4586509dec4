"""Machine details and the plumbing shared by the benchmark scripts.

Every recorded figure is only meaningful next to the machine it was measured on, so each
``--record`` writes :func:`machine_info` beside the table. The rest of this module is what the
three scripts share: running one case in a fresh interpreter (so peak RSS belongs to that case
alone), summarising repeated timings, and appending to ``bench/RESULTS.md`` and
``bench/results/``.

Nothing here imports streamcount, so the parent process of a benchmark stays small and never
warms a cache the measured child would profit from.
"""

from __future__ import annotations

import datetime as _dt
import importlib.util
import json
import os
import platform
import resource
import statistics
import subprocess
import sys
from pathlib import Path
from typing import Any

__all__ = [
    "BENCH_DIR",
    "BUSY_LOAD",
    "DATA_DIR",
    "REPO_DIR",
    "RESULTS_DIR",
    "RESULTS_MD",
    "current_rss_mb",
    "data_path",
    "format_machine",
    "load_average",
    "machine_info",
    "peak_rss_mb",
    "portable",
    "record",
    "run_case",
    "spread",
    "verdict",
]

BENCH_DIR = Path(__file__).resolve().parent
REPO_DIR = BENCH_DIR.parent


def _load_data_files() -> Any:
    """``tests/data_files.py``, the one place that locates the datasets, loaded by path.

    ``tests/`` is not a package and the benchmarks should not put it on ``sys.path``, so the
    module is loaded from its file; it imports nothing from streamcount.
    """
    name = "_streamcount_bench_data_files"
    spec = importlib.util.spec_from_file_location(name, REPO_DIR / "tests" / "data_files.py")
    if spec is None or spec.loader is None:
        raise ImportError(f"cannot load {REPO_DIR / 'tests' / 'data_files.py'}")
    module = importlib.util.module_from_spec(spec)
    sys.modules[name] = module
    spec.loader.exec_module(module)
    return module


_data_files = _load_data_files()
#: ``tests/data`` in this repository (``T10I4D100K.dat.gz``, ``retail.dat.gz``, ...; see its
#: README.md for provenance and terms)
DATA_DIR: Path = _data_files.DATA_DIR
#: ``data_path(name)``: the path of one dataset file; a missing file raises FileNotFoundError
data_path = _data_files.data_path
RESULTS_MD = BENCH_DIR / "RESULTS.md"
RESULTS_DIR = BENCH_DIR / "results"
#: a 1-minute load average above this marks a recorded run as disturbed (2 shared cores: one
#: busy process besides the benchmark already competes for caches and memory bandwidth)
BUSY_LOAD = 1.0


def _read(path: str) -> str:
    try:
        with open(path, encoding="utf-8") as fh:
            return fh.read()
    except OSError:
        return ""


def _cpu_model() -> str:
    for line in _read("/proc/cpuinfo").splitlines():
        if line.startswith("model name"):
            return line.split(":", 1)[1].strip()
    return platform.processor() or "unknown"


def _ram_gb() -> float | None:
    for line in _read("/proc/meminfo").splitlines():
        if line.startswith("MemTotal:"):
            return round(int(line.split()[1]) / 1024 / 1024, 1)
    return None


def _os_name() -> str:
    for line in _read("/etc/os-release").splitlines():
        if line.startswith("PRETTY_NAME="):
            return f"{line.split('=', 1)[1].strip(chr(34))} (kernel {platform.release()})"
    return platform.platform()


def _blas() -> str | None:
    """BLAS name and version from ``numpy.show_config`` (a dict lookup, so cheap)."""
    try:
        import numpy as np

        deps = np.show_config(mode="dicts").get("Build Dependencies", {})  # type: ignore[func-returns-value]
        blas = deps.get("blas", {})
        return f"{blas.get('name', '?')} {blas.get('version', '')}".strip()
    except Exception:  # older numpy without mode="dicts": not worth more than a None
        return None


def _git_commit() -> str | None:
    try:
        out = subprocess.run(
            ["git", "-C", str(REPO_DIR), "rev-parse", "--short", "HEAD"],
            capture_output=True,
            text=True,
            timeout=10,
            check=True,
        ).stdout.strip()
        dirty = subprocess.run(
            ["git", "-C", str(REPO_DIR), "status", "--porcelain", "--", "streamcount"],
            capture_output=True,
            text=True,
            timeout=10,
            check=True,
        ).stdout.strip()
    except (OSError, subprocess.SubprocessError):
        return None
    return out + (" (streamcount/ has uncommitted changes)" if dirty else "")


def load_average() -> tuple[float, float, float]:
    """1, 5 and 15 minute load averages (other processes on the machine show up here)."""
    return tuple(round(x, 2) for x in os.getloadavg())  # type: ignore[return-value]


def machine_info() -> dict[str, Any]:
    """Where and when the figures were taken: CPU, cores, RAM, OS, Python, numpy, BLAS."""
    import numpy as np

    affinity = len(os.sched_getaffinity(0)) if hasattr(os, "sched_getaffinity") else None
    return {
        "date": _dt.datetime.now(_dt.UTC).strftime("%Y-%m-%d %H:%M UTC"),
        "cpu": _cpu_model(),
        "cores": os.cpu_count(),
        "cores_usable": affinity,
        "ram_gb": _ram_gb(),
        "os": _os_name(),
        "python": platform.python_version(),
        "numpy": np.__version__,
        "blas": _blas(),
        "git_commit": _git_commit(),
        "load_average_at_start": load_average(),
    }


def format_machine(info: dict[str, Any]) -> str:
    """Markdown bullet list of :func:`machine_info` (plus any extra keys it was given)."""
    cores = f"{info.get('cores')} cores ({info.get('cores_usable')} usable)"
    versions = f"{info.get('python')} / {info.get('numpy')} / {info.get('blas')}"
    rows = [
        ("date", info.get("date")),
        ("CPU", f"{info.get('cpu')}, {cores}"),
        ("RAM", f"{info.get('ram_gb')} GB"),
        ("OS", info.get("os")),
        ("Python / numpy / BLAS", versions),
        ("streamcount commit", info.get("git_commit")),
        ("load average (1/5/15 min) at start", info.get("load_average_at_start")),
        ("load average at end", info.get("load_average_at_end")),
    ]
    return "\n".join(f"- {k}: {v}" for k, v in rows if v is not None)


def peak_rss_mb() -> float:
    """Peak resident set size of this process so far, MB (Linux reports ru_maxrss in KiB)."""
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024


def current_rss_mb() -> float:
    """Resident set size of this process now, MB (from ``/proc/self/statm``)."""
    fields = _read("/proc/self/statm").split()
    if len(fields) < 2:
        return float("nan")
    return int(fields[1]) * os.sysconf("SC_PAGE_SIZE") / 1024 / 1024


def spread(values: list[float]) -> dict[str, float]:
    """``{"median", "min", "max"}`` of repeated measurements."""
    return {"median": statistics.median(values), "min": min(values), "max": max(values)}


def verdict(ok: bool) -> str:
    return "PASS" if ok else "MISS"


def run_case(script: Path, case: dict[str, Any], *, timeout: float | None = None) -> dict[str, Any]:
    """Run ``script --case JSON`` in a fresh interpreter; return the JSON its last line prints.

    The child does its own warm-up and repeats; a fresh process per case means its peak RSS
    (``ru_maxrss``) is that case's alone and no case inherits another's caches or heap.
    """
    proc = subprocess.run(
        [sys.executable, str(script), "--case", json.dumps(case)],
        capture_output=True,
        text=True,
        timeout=timeout,
        cwd=str(REPO_DIR),
        check=False,
    )
    if proc.returncode != 0:
        raise RuntimeError(
            f"case {case} failed (exit {proc.returncode}):\n{proc.stderr.strip()[-4000:]}"
        )
    lines = [ln for ln in proc.stdout.splitlines() if ln.strip()]
    return json.loads(lines[-1])


def _looks_absolute(text: str) -> bool:
    return text.startswith(("/", "\\")) or (len(text) > 2 and text[1] == ":" and text[2] in "/\\")


def portable(obj: Any, places: dict[Path, str] | None = None) -> Any:
    """A copy of ``obj`` (JSON-like) with no absolute path of this machine left in its strings.

    A string naming a path inside the repository becomes relative to its root
    (``tests/data/retail.dat.gz``); one inside a key of ``places`` gets that key replaced by
    its placeholder (e.g. a temporary folder by ``"<tmpdir>"``). Recorded results are
    committed, and a path into one machine's home or temporary folder means nothing on another.

    Parameters
    ----------
    obj : Any
        Dicts, lists, tuples, strings and scalars, as recorded by :func:`record`.
    places : dict of pathlib.Path to str, optional
        Further folders to hide, each with the placeholder written instead.

    Returns
    -------
    Any
        The rewritten copy; strings that are not paths are unchanged.
    """
    prefixes = [(q, tag) for p, tag in (places or {}).items() for q in (p, p.resolve())]
    prefixes += [(REPO_DIR, ""), (REPO_DIR.resolve(), "")]

    def fix(value: Any) -> Any:
        if isinstance(value, dict):
            return {k: fix(v) for k, v in value.items()}
        if isinstance(value, list | tuple):
            return [fix(v) for v in value]
        if not isinstance(value, str) or not _looks_absolute(value):
            return value
        path = Path(value)
        for prefix, tag in prefixes:
            if path == prefix or prefix in path.parents:
                rel = path.relative_to(prefix).as_posix()
                return f"{tag}/{rel}" if tag else rel
        return value

    return fix(obj)


def _absolute_strings(obj: Any, where: str = "") -> list[str]:
    if isinstance(obj, dict):
        return [s for k, v in obj.items() for s in _absolute_strings(v, f"{where}.{k}")]
    if isinstance(obj, list | tuple):
        return [s for i, v in enumerate(obj) for s in _absolute_strings(v, f"{where}[{i}]")]
    return (
        [f"{where.lstrip('.')} = {obj!r}"] if isinstance(obj, str) and _looks_absolute(obj) else []
    )


def record(
    kind: str,
    title: str,
    body_md: str,
    raw: dict[str, Any],
    places: dict[Path, str] | None = None,
) -> tuple[Path, Path]:
    """Append a dated section to RESULTS.md and write raw JSON to results/<date>-<kind>.json.

    A second run on the same day gets ``-2``, ``-3``, ... so nothing is overwritten. Paths in
    ``raw`` are made portable first (see :func:`portable`, which ``places`` is passed to); an
    absolute path left after that is written anyway (the figures are not thrown away) but
    named on stderr, and ``tests/test_standalone.py`` fails until it is fixed.
    """
    raw = portable(raw, places)
    for leftover in _absolute_strings(raw):
        print(f"warning: absolute path recorded in {kind} results: {leftover}", file=sys.stderr)
    info = raw.get("machine", {})
    day = _dt.datetime.now(_dt.UTC).strftime("%Y-%m-%d")
    RESULTS_DIR.mkdir(parents=True, exist_ok=True)
    path = RESULTS_DIR / f"{day}-{kind}.json"
    n = 2
    while path.exists():
        path = RESULTS_DIR / f"{day}-{kind}-{n}.json"
        n += 1
    path.write_text(json.dumps(raw, indent=2, sort_keys=True) + "\n", encoding="utf-8")
    if not RESULTS_MD.exists():
        RESULTS_MD.write_text(
            "# Recorded benchmark figures\n\nAppended by `bench/*.py --record`; see "
            "bench/README.md for the method. Raw JSON of each run is in bench/results/.\n",
            encoding="utf-8",
        )
    loads = [*info.get("load_average_at_start", ()), *info.get("load_average_at_end", ())]
    busy = ""
    if loads and max(loads[0], loads[3] if len(loads) > 3 else 0) > BUSY_LOAD:
        busy = (
            f"- **disturbed**: 1-minute load average above {BUSY_LOAD} at start or end (other "
            "engineers' processes on the shared cores); these figures are lower and noisier "
            "than on a quiet machine\n"
        )
    section = (
        f"\n## {info.get('date', day)}: {title}\n\n"
        f"{format_machine(info)}\n{busy}- raw: bench/results/{path.name}\n\n"
        f"{body_md.rstrip()}\n"
    )
    with RESULTS_MD.open("a", encoding="utf-8") as fh:
        fh.write(section)
    return RESULTS_MD, path
