"""Where the open datasets live: ``tests/data/`` inside the repository, found from this file.

The one place that locates them, for the tests (``from data_files import data_path``) and the
benchmark scripts (``bench/machine.py`` loads this file by path). Provenance, terms, statistics
and checksums of every file are in ``tests/data/README.md``; ``tests/test_data_manifest.py``
checks them. There is no environment override: the data is part of the repository, so a
missing file is an error, never a reason to skip.

Nothing here imports streamcount, so the benchmarks' parent process stays small.
"""

from __future__ import annotations

from pathlib import Path

__all__ = ["DATA_DIR", "REPO_DIR", "data_path"]

#: the repository's root folder (this file is ``tests/data_files.py``)
REPO_DIR = Path(__file__).resolve().parent.parent
#: ``tests/data``: the datasets, ``reference_counts.json`` and their README.md
DATA_DIR = Path(__file__).resolve().parent / "data"


def data_path(name: str) -> Path:
    """Path of the dataset file ``name`` (e.g. ``"retail.dat.gz"``) in :data:`DATA_DIR`.

    Parameters
    ----------
    name : str
        A file name listed in ``tests/data/README.md``.

    Returns
    -------
    pathlib.Path
        The absolute path of the file (absolute only at run time; nothing records it).

    Raises
    ------
    FileNotFoundError
        If the file is not there: it ships with the repository, so its absence means a broken
        checkout, and the message says where it was looked for.
    """
    path = DATA_DIR / name
    if not path.is_file():
        raise FileNotFoundError(
            f"dataset {name!r} not found in {DATA_DIR.relative_to(REPO_DIR).as_posix()}/ of the "
            f"repository at {REPO_DIR}; it is part of the repository (see "
            "tests/data/README.md), so the checkout is incomplete"
        )
    return path
