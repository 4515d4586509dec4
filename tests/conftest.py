"""Shared test settings: hypothesis profiles, the external-tool rule, the service fixture.

``STREAMCOUNT_HYPOTHESIS_PROFILE=ci`` runs more examples without a deadline; the default
``dev`` profile keeps the suite quick on a laptop. External programs (promtool, nats-server,
Chromium) are found through :mod:`tools`, registered here as a plugin so the
``requires_tool`` marker works everywhere.
"""

from __future__ import annotations

import contextlib
import os
import warnings
from collections.abc import Iterator
from pathlib import Path

import pytest
import tools
from hypothesis import HealthCheck, settings
from service_helpers import ServiceRunner, service_runner

# When a property test fails, hypothesis' pytest plugin imports its patch writer, which pulls
# in libcst -> mypy_extensions and emits a DeprecationWarning; with ``filterwarnings = error``
# that turns the failure report into an INTERNALERROR that stops the whole run. Import it once
# here with that warning silenced so a failing example is reported normally.
with warnings.catch_warnings():
    warnings.simplefilter("ignore", DeprecationWarning)
    # without libcst the plugin skips the patch writer too
    with contextlib.suppress(ImportError):
        import hypothesis.extra._patching  # noqa: F401

settings.register_profile(
    "dev",
    max_examples=50,
    deadline=None,
    suppress_health_check=[HealthCheck.too_slow],
)
settings.register_profile(
    "ci",
    max_examples=300,
    deadline=None,
    suppress_health_check=[HealthCheck.too_slow],
)
settings.load_profile(os.environ.get("STREAMCOUNT_HYPOTHESIS_PROFILE", "dev"))


def pytest_configure(config: pytest.Config) -> None:
    # the requires_tool marker and its skip-by-hand / fail-under-CI rule (tests/tools.py)
    if not config.pluginmanager.is_registered(tools):
        config.pluginmanager.register(tools, "streamcount-tools")


@pytest.fixture
def services(tmp_path: Path) -> Iterator[ServiceRunner]:
    """Starts ``streamcount run`` subprocesses in ``tmp_path``; all are killed at teardown."""
    with service_runner(tmp_path) as runner:
        yield runner
