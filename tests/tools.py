"""External programs the tests drive (promtool, nats-server, Chromium), found one way.

One rule for every such program:

* found on ``PATH`` (or in ``/usr/sbin`` / ``/sbin``, where Debian puts ``nats-server`` and
  where a non-root ``PATH`` does not look): the test gets its absolute path;
* missing when run by hand: the test is *skipped*, naming the Debian package and
  ``make tools`` (which installs it as root);
* missing under ``CI=true``: the test *fails*, so CI never passes by skipping.

Use :func:`require_tool` inside a test (it returns the path), or the marker
``@pytest.mark.requires_tool("promtool")`` on a test or module; this module is also a pytest
plugin that applies the marker (``tests/conftest.py`` registers it).

:data:`TOOL_PACKAGES` must match ``TOOLS`` in the Makefile (``tests/test_tools.py`` checks).
"""

from __future__ import annotations

import os
import shutil

import pytest

__all__ = [
    "CI_ENV",
    "TOOL_PACKAGES",
    "find_tool",
    "in_ci",
    "pytest_configure",
    "pytest_runtest_setup",
    "require_tool",
]

#: program name -> Debian package providing it (the Makefile's ``TOOLS`` holds the same pairs)
TOOL_PACKAGES: dict[str, str] = {
    "promtool": "prometheus",
    "nats-server": "nats-server",
    "chromium": "chromium",
    "chromedriver": "chromium-driver",
}

#: the environment variable that, set to ``true``, turns a missing tool into a failure
CI_ENV = "CI"

#: searched after ``PATH``: Debian installs some daemons there and a user's PATH often omits it
_SBIN_DIRS = ("/usr/sbin", "/sbin")


def in_ci() -> bool:
    """Whether the run is CI (``CI=true``, as ``.ci/run`` and most CI services set it)."""
    return os.environ.get(CI_ENV, "").strip().lower() in {"true", "1", "yes"}


def find_tool(name: str) -> str | None:
    """Absolute path of the program ``name`` (``PATH`` first, then the sbin directories)."""
    return shutil.which(name) or shutil.which(name, path=os.pathsep.join(_SBIN_DIRS))


def require_tool(name: str, package: str | None = None) -> str:
    """The absolute path of the program ``name``; skip the test, or fail it under CI, if absent.

    Parameters
    ----------
    name:
        The program, e.g. ``"promtool"``.
    package:
        The Debian package that provides it; defaults to :data:`TOOL_PACKAGES` ``[name]``.

    Raises
    ------
    pytest.skip.Exception
        When the program is missing and the run is not CI.
    pytest.fail.Exception
        When the program is missing and ``CI=true``.
    """
    path = find_tool(name)
    if path is not None:
        return path
    package = package or TOOL_PACKAGES.get(name)
    if package is None:
        raise KeyError(f"no Debian package known for {name!r}; pass package= or add it")
    reason = (
        f"{name} not found (Debian package {package!r}); install it with "
        f"'make tools' as root, or 'apt-get install {package}'"
    )
    if in_ci():
        pytest.fail(f"{reason}; {CI_ENV}=true requires every external tool", pytrace=False)
    pytest.skip(reason)


def pytest_configure(config: pytest.Config) -> None:
    config.addinivalue_line(
        "markers",
        "requires_tool(name, package=None): the test drives the external program NAME "
        "(skipped when missing, failed under CI=true; see tests/tools.py)",
    )


def pytest_runtest_setup(item: pytest.Item) -> None:
    """Apply every ``requires_tool`` marker of ``item`` before it runs."""
    for mark in item.iter_markers("requires_tool"):
        require_tool(*mark.args, **mark.kwargs)
