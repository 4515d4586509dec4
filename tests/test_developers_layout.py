"""The contributor guide's layout matches the tree (issue "The house in order").

DEVELOPERS.md names every module of the package, by its path under ``streamcount/`` or, inside
the row or paragraph of its package folder, by its file name; every ``.py`` file it names
exists. The tree itself is the reference: a module added or moved without the guide fails here.
"""

from __future__ import annotations

import re
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
GUIDE = (ROOT / "DEVELOPERS.md").read_text(encoding="utf-8")
PACKAGE = ROOT / "streamcount"


def _modules() -> list[str]:
    return sorted(
        str(p.relative_to(PACKAGE)).replace("\\", "/")
        for p in PACKAGE.rglob("*.py")
        if p.name != "__init__.py"
    )


def _blocks() -> list[str]:
    """Table rows and paragraphs: the unit in which a folder and its file names go together."""
    return [b for b in re.split(r"\n(?=\|)|\n\s*\n", GUIDE) if b.strip()]


def test_every_module_is_in_the_guide() -> None:
    blocks = _blocks()
    missing = []
    for module in _modules():
        if f"`{module}`" in GUIDE or f"`streamcount/{module}`" in GUIDE:
            continue
        folder, _, name = module.rpartition("/")
        if folder and any(
            f"`{folder}/" in b and re.search(rf"`{re.escape(name)}`", b) for b in blocks
        ):
            continue
        missing.append(module)
    assert not missing, f"DEVELOPERS.md does not name: {missing}"


def test_every_file_the_guide_names_exists() -> None:
    basenames = {m.rpartition("/")[2] for m in _modules()}
    stale = []
    for named in set(re.findall(r"`([\w./-]+\.py)`", GUIDE)):
        candidates = [PACKAGE / named, ROOT / named]
        if any(c.exists() for c in candidates) or named in basenames or named == "__init__.py":
            continue
        stale.append(named)
    assert not stale, f"DEVELOPERS.md names files that do not exist: {sorted(stale)}"
