"""The repository stands alone: no committed file names a folder of a development machine.

The rule, applied to every text file of the tree (``git ls-files --cached --others
--exclude-standard``: tracked files plus new ones not ignored; without git, a walk of the
folder that skips what ``.gitignore`` lists); a file is text when it has no NUL byte and
decodes as UTF-8, so the gzip datasets are not read:

1. **Home and workspace roots.** A path that *starts* at the filesystem root with one of the
   folders ``work``, ``root``, ``home`` or ``Users`` (slash, folder name, slash). "Starts"
   means the leading slash does not follow a letter, digit, ``_``, ``.``, ``~`` or ``-``, so
   relative paths that merely contain such a folder (``bench/work/x``, or the same after a
   dot and a slash) and URLs
   (``https://example.org/home/``) are not flagged.
2. **Windows drives.** A drive letter, a colon and one or two backslashes followed by a name
   (``X:`` + backslash + ``Users``), the letter not following a word character.
3. **The reference shelf.** The relative path dot-dot-slash ``shared``, and a pathlib join
   onto a quoted ``"shared"`` (slash, optional spaces, the quoted word): the datasets used to
   be read from a ``shared`` folder beside the repository; they are in ``tests/data`` now.
4. **Recorded results.** In ``bench/results/*.json``, any string under a key whose name
   contains ``path``, ``dir``, ``file`` or ``folder`` must be relative: not starting with a
   slash, a backslash or a drive. ``bench/machine.py`` writes such paths relative to the
   repository root, or a temporary folder as ``<tmpdir>``.

Not flagged, on purpose: system locations that are the same on every machine and appear in
examples and tests, e.g. ``/var/lib/streamcount`` in a systemd unit, ``/etc/...``,
``/dev/full`` or ``/dev/null`` in a test, ``/usr/bin/env`` or another tool path, ``/proc/...``.
No file is exempt, this one included (its patterns are assembled so that they do not match
themselves), and there is no allow-comment: a path that must stay is written relative.
"""

from __future__ import annotations

import fnmatch
import importlib.util
import json
import os
import re
import shutil
import subprocess
from pathlib import Path

import pytest
from data_files import REPO_DIR

_ROOTS = ("work", "root", "home", "Users")
_SLASH = "/"
#: rule 1, rule 2 and rule 3 of the module docstring, as one pattern
FORBIDDEN = re.compile(
    r"(?<![\w.~-])" + re.escape(_SLASH) + "(?:" + "|".join(_ROOTS) + ")" + re.escape(_SLASH)
    + r"|(?<!\w)[A-Za-z]:\\{1,2}(?=[\w.$-])"
    + "|" + re.escape(".." + _SLASH + "shared") + r"\b"
    + "|" + re.escape(_SLASH) + r"""\s*["']shared["']"""
)  # fmt: skip
#: rule 4: keys of recorded results whose string values are paths
PATH_KEY = re.compile(r"path|dir|file|folder", re.IGNORECASE)
_ABSOLUTE = re.compile(r"^(?:[/\\]|[A-Za-z]:[/\\])")


def _gitignore_patterns(root: Path) -> list[str]:
    path = root / ".gitignore"
    if not path.is_file():
        return []
    lines = (ln.strip() for ln in path.read_text(encoding="utf-8").splitlines())
    return [ln for ln in lines if ln and not ln.startswith(("#", "!"))]


def _ignored(rel: str, is_dir: bool, patterns: list[str]) -> bool:
    """The subset of .gitignore semantics this repository's .gitignore uses."""
    name = rel.rsplit("/", 1)[-1]
    for pat in patterns:
        dir_only = pat.endswith("/")
        pat = pat.rstrip("/")
        if dir_only and not is_dir:
            continue
        if "/" in pat:  # anchored at the root
            if fnmatch.fnmatchcase(rel, pat.lstrip("/")):
                return True
        elif fnmatch.fnmatchcase(name, pat):
            return True
    return False


def walk_files(root: Path) -> list[str]:
    """Files under ``root`` (relative, POSIX), skipping ``.git`` and what .gitignore lists."""
    patterns = _gitignore_patterns(root)
    out: list[str] = []
    for dirpath, dirnames, filenames in os.walk(root):
        base = Path(dirpath).relative_to(root).as_posix()
        prefix = "" if base == "." else base + "/"
        dirnames[:] = sorted(
            d
            for d in dirnames
            if d != ".git" and not _ignored(prefix + d, is_dir=True, patterns=patterns)
        )
        out += [
            prefix + f
            for f in filenames
            if f != ".git" and not _ignored(prefix + f, is_dir=False, patterns=patterns)
        ]  # ".git" is a file in a worktree
    return sorted(out)


def git_files(root: Path) -> list[str] | None:
    """Tracked and new (not ignored) files per git, or None without git or outside a checkout."""
    if shutil.which("git") is None:
        return None
    proc = subprocess.run(
        ["git", "-C", str(root), "ls-files", "-z", "--cached", "--others", "--exclude-standard"],
        capture_output=True,
        check=False,
    )
    if proc.returncode != 0:
        return None
    names = {n for n in proc.stdout.decode("utf-8").split("\0") if n}
    return sorted(n for n in names if (root / n).is_file())  # deleted but still tracked: gone


def repo_files(root: Path = REPO_DIR) -> list[str]:
    files = git_files(root)
    return files if files is not None else walk_files(root)


def _text(path: Path) -> str | None:
    data = path.read_bytes()
    if b"\0" in data:
        return None
    try:
        return data.decode("utf-8")
    except UnicodeDecodeError:
        return None


def line_findings(rel: str, text: str) -> list[str]:
    """``file:line: match`` for rules 1-3 in ``text``."""
    return [
        f"{rel}:{n}: {m.group(0)!r} in {line.strip()[:120]!r}"
        for n, line in enumerate(text.splitlines(), start=1)
        for m in FORBIDDEN.finditer(line)
    ]


def result_findings(rel: str, text: str) -> list[str]:
    """``file:line: key = value`` for rule 4 in one recorded JSON result."""
    lines = text.splitlines()
    found: list[str] = []
    cursor = 0  # json.loads keeps the file's order, so each hit is searched for after the last

    def walk(obj: object, key: str) -> None:
        nonlocal cursor
        if isinstance(obj, dict):
            for k, v in obj.items():
                walk(v, k if PATH_KEY.search(k) else key)
        elif isinstance(obj, list):
            for v in obj:
                walk(v, key)
        elif isinstance(obj, str) and key and _ABSOLUTE.match(obj):
            needle = json.dumps(obj)
            n = next((i for i in range(cursor, len(lines)) if needle in lines[i]), -1) + 1
            cursor = n or cursor
            found.append(f"{rel}:{n}: {key} = {obj!r} is absolute")

    walk(json.loads(text), "")
    return found


def findings(root: Path = REPO_DIR) -> list[str]:
    out: list[str] = []
    for rel in repo_files(root):
        text = _text(root / rel)
        if text is None:
            continue
        out += line_findings(rel, text)
        if fnmatch.fnmatchcase(rel, "bench/results/*.json"):
            out += result_findings(rel, text)
    return out


def test_no_committed_file_names_a_development_machine_path() -> None:
    found = findings()
    assert not found, "absolute machine paths (see tests/test_standalone.py):\n" + "\n".join(found)


def _p(text: str) -> str:
    """Examples are written with ``|`` for ``/`` and ``!`` for a backslash, so this file passes."""
    return text.replace("|", "/").replace("!", "\\")


@pytest.mark.parametrize(
    "line",
    [
        "data = '|work|shared|data'",
        "see |root|notes.md",
        "cd |home|alice|streamcount",
        "(|Users|bob|x)",
        "`|home|x`",
        "path=|work|wt|data",
        'open("C:!Users!me!x")',
        'open("D:!!data!!retail.dat.gz")',
        "DATA = REPO.parent | '..|shared|data'",
        "read from ..|shared|data",
        "file:||/home|x",
        'DATA_DIR = REPO_DIR.parent | "shared" | "data"',
        "Path(__file__).parents[2] |  'shared'",
    ],
)
def test_rule_flags_machine_paths(line: str) -> None:
    assert line_findings("x", _p(line)), _p(line)


@pytest.mark.parametrize(
    "line",
    [
        "ExecStart=|usr|bin|streamcount serve --config |etc|streamcount|config.yaml",
        "StateDirectory=|var|lib|streamcount",
        "open('|dev|full', 'w')",
        "#!|usr|bin|env python3",
        "bench|work|x and .|home|y and ~|work|z",
        "https:||example.org|home|index.html",
        "tests|data|retail.dat.gz",
        "the cores are shared with other engineers",
        "shared|data is a relative name, not the shelf",
        "pattern = r'[a-z]:!!d+'",
        'folder = "shared"  # a word, not a join',
        "a|b shared|c",
        "ratio 12:!n",
    ],
)
def test_rule_leaves_legitimate_strings_alone(line: str) -> None:
    assert not line_findings("x", _p(line)), _p(line)


def test_recorded_results_rule() -> None:
    bad = json.dumps(
        {"case": {"path": _p("|tmp|streamcount-bench-x|T.dat")}, "out_dir": [_p("C:!x")]},
        indent=2,
    )
    assert len(result_findings("r.json", bad)) == 2
    good = json.dumps(
        {"case": {"path": "<tmpdir>/T.dat"}, "endpoint": "/metrics", "data_file": "tests/data/x"}
    )
    assert result_findings("r.json", good) == []


def test_walk_without_git_sees_the_files_git_sees() -> None:
    files = git_files(REPO_DIR)
    if files is None:
        pytest.skip("git is not installed or this is not a git checkout: the walk is all there is")
    assert walk_files(REPO_DIR) == files


def test_benchmarks_record_portable_paths(tmp_path: Path) -> None:
    # bench/machine.py (not a package: loaded by path) rewrites paths before recording
    spec = importlib.util.spec_from_file_location(
        "_bench_machine", REPO_DIR / "bench" / "machine.py"
    )
    assert spec is not None and spec.loader is not None
    machine = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(machine)
    assert machine.DATA_DIR == REPO_DIR / "tests" / "data"
    raw = {
        "case": {"path": str(tmp_path / "T10I4D100K.dat"), "repeat": 3},
        "data_file": str(machine.data_path("retail.dat.gz")),
        "report": ["itemsets"],
    }
    out = machine.portable(raw, {tmp_path: "<tmpdir>"})
    assert out == {
        "case": {"path": "<tmpdir>/T10I4D100K.dat", "repeat": 3},
        "data_file": "tests/data/retail.dat.gz",
        "report": ["itemsets"],
    }
    assert result_findings("r.json", json.dumps(out, indent=2)) == []


_MARKER = re.compile(r"^(<{7} |={7}$|>{7} )", re.M)


def test_no_committed_file_holds_merge_conflict_markers() -> None:
    found = []
    for rel in repo_files(REPO_DIR):
        text = _text(REPO_DIR / rel)
        if text is None:
            continue
        found += [f"{rel}:{text.count(chr(10), 0, m.start()) + 1}" for m in _MARKER.finditer(text)]
    assert not found, "merge conflict markers left in:\n" + "\n".join(found)
