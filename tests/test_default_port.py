"""Every config, example and doc quotes the one default port, ``DEFAULT_PORT``.

The port lives in :data:`streamcount.config.settings.DEFAULT_PORT`; YAML and Markdown cannot
import it, so this test reads them: every ``host:port`` for a local or any-address listener in
the configs, examples, docs and package sources uses ``DEFAULT_PORT`` (or 0, "any free port"),
and the old default, 9464, which another program documents as its own exporter port, appears
nowhere but in the CHANGELOG entry recording the change.
"""

from __future__ import annotations

import re
from pathlib import Path

import pytest
import yaml

from streamcount.config.load import config_from_mapping
from streamcount.config.settings import DEFAULT_LISTEN, DEFAULT_PORT, Config
from streamcount.errors import ConfigError

REPO = Path(__file__).resolve().parent.parent
OLD_PORT = "9464"
#: ports an example uses for something other than streamcount's listener
OTHER_PORTS = {
    8765: "examples/webhook_receiver.py: the example webhook receiver, a separate program",
    4222: "NATS's own documented client port (the nats source's server, a separate program)",
}
_ADDRESS = re.compile(r"(?:127\.0\.0\.1|0\.0\.0\.0|localhost|\[::1?\]):(\d+)")


def _text_files(*, tests: bool) -> list[Path]:
    """Configs, examples, docs and package sources; with ``tests``, the tests too (never this
    file; never recorded benchmark results)."""
    files = [REPO / "README.md", REPO / "DEVELOPERS.md", REPO / "Makefile"]
    folders = [
        ("config", ("*.yaml",)),
        ("examples", ("*.yaml", "*.yml", "*.py", "*.md")),
        ("streamcount", ("**/*.py", "**/*.json")),
        ("bench", ("*.py", "*.md")),
        (".ci", ("*",)),
    ]
    if tests:
        folders.append(("tests", ("**/*.py", "**/*.yml")))
    for folder, patterns in folders:
        for pattern in patterns:
            files.extend(p for p in (REPO / folder).glob(pattern) if p.is_file())
    return sorted(set(files) - {Path(__file__).resolve()})


def test_default_port_is_outside_the_crowded_ranges() -> None:
    # 9100-9999: the Prometheus default-port allocations list, full since 2023; 30000-32767:
    # Kubernetes NodePorts; 32768 and up: Linux and IANA ephemeral ports
    assert 1024 < DEFAULT_PORT < 30000 and not 9100 <= DEFAULT_PORT <= 9999
    assert DEFAULT_LISTEN.rpartition(":") == ("127.0.0.1", ":", str(DEFAULT_PORT))
    assert Config().server.listen == DEFAULT_LISTEN


def test_old_port_appears_only_in_the_changelog() -> None:
    offenders = [
        str(p.relative_to(REPO))
        for p in _text_files(tests=True)
        if OLD_PORT in p.read_text(encoding="utf-8")
    ]
    assert offenders == []
    assert OLD_PORT in (REPO / "CHANGELOG.md").read_text(encoding="utf-8")


def test_every_listener_address_quotes_the_default_port() -> None:
    # (tests are left out: they write bad and throw-away addresses on purpose)
    seen = 0
    for path in _text_files(tests=False):
        for lineno, line in enumerate(path.read_text(encoding="utf-8").splitlines(), 1):
            for match in _ADDRESS.finditer(line):
                port = int(match.group(1))
                where = f"{path.relative_to(REPO)}:{lineno}: {line.strip()}"
                assert port in (0, DEFAULT_PORT, *OTHER_PORTS), where
                seen += port == DEFAULT_PORT
    # README (2), default, dev and production configs, three examples: quoted, not dropped
    assert seen >= 9, seen


@pytest.mark.parametrize("name", ["default.yaml", "dev.yaml", "example-prod.yaml"], ids=lambda n: n)
def test_configs_listen_on_the_default_port(name: str) -> None:
    raw = yaml.safe_load((REPO / "config" / name).read_text(encoding="utf-8"))
    assert int(raw["server"]["listen"].rpartition(":")[2]) == DEFAULT_PORT, name
    if name == "default.yaml":
        assert raw["server"]["listen"] == DEFAULT_LISTEN


def test_examples_and_readme_quote_the_default() -> None:
    prom = yaml.safe_load((REPO / "examples" / "prometheus.yml").read_text(encoding="utf-8"))
    assert prom["scrape_configs"][0]["static_configs"][0]["targets"] == [DEFAULT_LISTEN]
    for name in ("http-ingest.yaml", "jsonl-orders.yaml"):
        raw = yaml.safe_load((REPO / "examples" / name).read_text(encoding="utf-8"))
        assert raw["server"]["listen"] == DEFAULT_LISTEN, name
    readme = (REPO / "README.md").read_text(encoding="utf-8")
    assert f"| `server.listen` | `{DEFAULT_LISTEN}` |" in readme
    assert f"(`server.listen`, `{DEFAULT_LISTEN}` by default)" in readme


def test_validation_message_quotes_the_default() -> None:
    with pytest.raises(ConfigError, match=re.escape(repr(DEFAULT_LISTEN))):
        config_from_mapping({"server": {"listen": "no-port-here"}})
