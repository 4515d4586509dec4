"""The ``streamcount`` command: replay, run, merge, demo, generate, check-config.

Every option that changes a setting is also a config key with the same name in snake_case
(``--min-support`` is ``rules.min_support``); options override the file given with
``--config``. Exit codes: 0 success, 2 a usage, config or input error (one line on stderr).
"""

from __future__ import annotations

import argparse
import json
import logging
import sys
import typing
from collections.abc import Sequence
from typing import Any

from streamcount import __version__
from streamcount.errors import StreamcountError

__all__ = ["build_parser", "main", "setup_logging"]

#: (section, key, type) of every setting that has a command-line option
SETTING_OPTIONS: tuple[tuple[str, str, type], ...] = (
    ("input", "format", str),
    ("engine", "epsilon", float),
    ("engine", "window_size", int),
    ("engine", "pane_size", int),
    ("engine", "window_seconds", float),
    ("engine", "pane_seconds", float),
    ("engine", "allowed_lateness_seconds", float),
    ("engine", "max_itemset_size", int),
    ("engine", "max_basket_items", int),
    ("engine", "batch_size", int),
    ("rules", "min_support", float),
    ("rules", "min_confidence", float),
    ("rules", "min_lift", float),
    ("rules", "min_count", int),
    ("rules", "max_consequent_size", int),
    ("rules", "max_p_value", float),
    ("rules", "significance", str),
    ("alerts", "false_alerts_per_million", float),
    ("alerts", "recent_panes", int),
)
#: JSON lines field names (input.jsonl.*)
JSONL_OPTIONS = ("id_field", "ts_field", "items_field", "item_name_field")


def _add_setting_options(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("--config", metavar="FILE", help="YAML config; options override it")
    group = parser.add_argument_group("settings (each is also a config key, snake_case)")
    for section, key, typ in SETTING_OPTIONS:
        group.add_argument(
            "--" + key.replace("_", "-"),
            dest=f"set__{section}__{key}",
            type=typ,
            default=None,
            metavar=key.upper(),
            help=f"config key {section}.{key}",
        )
    for key in JSONL_OPTIONS:
        group.add_argument(
            "--" + key.replace("_", "-"),
            dest=f"set__input.jsonl__{key}",
            default=None,
            metavar="FIELD",
            help=f"config key input.jsonl.{key} (dotted paths reach nested objects)",
        )


def config_from_args(args: argparse.Namespace, extra: dict[str, object] | None = None) -> Any:
    from streamcount.config.load import apply_overrides, load_config
    from streamcount.config.settings import Config

    config = load_config(args.config) if getattr(args, "config", None) else Config()
    overrides: dict[str, object] = {}
    for name, value in vars(args).items():
        if name.startswith("set__") and value is not None:
            _, section, key = name.split("__")
            overrides[f"{section}.{key}"] = value
    overrides.update(extra or {})
    return apply_overrides(config, overrides) if overrides else config


class _JsonFormatter(logging.Formatter):
    def format(self, record: logging.LogRecord) -> str:
        return json.dumps(
            {
                "time": self.formatTime(record),
                "level": record.levelname,
                "logger": record.name,
                "message": record.getMessage(),
            }
        )


def setup_logging(level: str, fmt: str) -> None:
    """Log to stderr (``text`` or ``json`` lines); the one place handlers are installed."""
    handler = logging.StreamHandler(sys.stderr)
    if fmt == "json":
        handler.setFormatter(_JsonFormatter())
    else:
        handler.setFormatter(logging.Formatter("%(asctime)s %(levelname)s %(name)s: %(message)s"))
    root = logging.getLogger("streamcount")
    root.handlers[:] = [handler]
    root.setLevel(level)
    root.propagate = False


def _cmd_replay(args: argparse.Namespace) -> int:
    from streamcount.intake.formats import format_for_path
    from streamcount.replay import replay_file
    from streamcount.replay_workers import default_workers

    extra: dict[str, object] = {}
    if args.set__input__format is None and not args.config:
        implied = format_for_path(args.path)
        if implied is not None:  # without --format, a .jsonl or .csv name decides
            extra["input.format"] = implied
    config = config_from_args(args, extra)
    parts = [p.strip() for p in args.report.split(",") if p.strip()]
    workers = default_workers() if args.workers is None else args.workers
    result = replay_file(args.path, config, report=parts, progress=sys.stderr, workers=workers)
    why = result.stats.get("why_one_process")
    if args.workers is not None and args.workers > 1 and why:
        sys.stderr.write(f"replay: one process ({why})\n")
    text = json.dumps(result.report, separators=(",", ":"), allow_nan=False)
    if args.output:
        with open(args.output, "w", encoding="utf-8") as fh:
            fh.write(text + "\n")
    else:
        sys.stdout.write(text + "\n")
    return 0


def _cmd_check_config(args: argparse.Namespace) -> int:
    from streamcount.config.load import check_config_main

    return check_config_main(args.file)


def _cmd_run(args: argparse.Namespace) -> int:
    """``streamcount run``: build the config from the file and flags, then run."""
    from streamcount.service.loop import Service

    extra: dict[str, object] = {}
    if args.source is not None:
        extra["input.source"] = [s.strip() for s in args.source.split(",") if s.strip()]
    if args.input is not None:
        extra["input.path"] = args.input
    if args.listen is not None:
        extra["server.listen"] = args.listen
    if args.checkpoint_dir is not None:
        extra["checkpoint.checkpoint_dir"] = args.checkpoint_dir
    if args.no_follow:
        extra["input.follow"] = False
    if args.accept_gap:
        extra["input.nats.accept_gap"] = True
    config = config_from_args(args, extra)
    setup_logging(config.logging.level, config.logging.format)
    return Service(config, fresh=args.fresh).run()


def _cmd_merge(args: argparse.Namespace) -> int:
    """``streamcount merge``: the cluster's merger (``cluster.role: merger``), run like ``run``."""
    from streamcount.service.loop import Service

    extra: dict[str, object] = {"cluster.role": "merger"}
    if args.listen is not None:
        extra["server.listen"] = args.listen
    if args.checkpoint_dir is not None:
        extra["checkpoint.checkpoint_dir"] = args.checkpoint_dir
    if args.accept_gap:
        extra["input.nats.accept_gap"] = True
    config = config_from_args(args, extra)
    setup_logging(config.logging.level, config.logging.format)
    return Service(config, fresh=args.fresh).run()


def _cmd_demo(args: argparse.Namespace) -> int:
    from streamcount.demo.run import demo_main

    return demo_main(args)


def _positive_int(text: str) -> int:
    """An integer of at least 1 (argparse type)."""
    try:
        value = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"{text!r} is not a whole number") from None
    if value < 1:
        raise argparse.ArgumentTypeError(f"{value} is below 1")
    return value


class _Parser(argparse.ArgumentParser):
    """Usage errors as one line on stderr (exit 2), pointing at ``--help``."""

    def error(self, message: str) -> typing.NoReturn:
        self.exit(2, f"{self.prog}: error: {message} (see {self.prog} --help)\n")


def build_parser() -> argparse.ArgumentParser:
    parser = _Parser(
        prog="streamcount",
        description="Live co-purchase counts, association rules and alerts over a sliding "
        "window with a guaranteed error bound.",
    )
    parser.add_argument("--version", action="version", version=f"streamcount {__version__}")
    sub = parser.add_subparsers(dest="command", required=True, metavar="COMMAND")

    rp = sub.add_parser("replay", help="count a whole file as fast as possible; JSON report")
    rp.add_argument(
        "path",
        help="basket lines, JSON lines or CSV file (.gz read transparently; - for stdin); "
        "without --format a .jsonl/.ndjson/.json or .csv name selects the format",
    )
    rp.add_argument("--output", metavar="FILE", help="write the report here instead of stdout")
    rp.add_argument(
        "--report",
        default="itemsets",
        help="comma-separated parts: itemsets, rules, alerts (default: itemsets)",
    )
    rp.add_argument(
        "--workers",
        type=_positive_int,
        metavar="N",
        help="processes counting whole panes in parallel (default: the cores, at most 8); "
        "the report is the same as with 1. A plain file of basket or JSON lines with a "
        "count-based window; stdin, .gz, CSV and time-based windows run in one process",
    )
    _add_setting_options(rp)
    rp.set_defaults(func=_cmd_replay)

    run = sub.add_parser("run", help="the long-running service")
    run.add_argument(
        "--source",
        metavar="NAMES",
        help="where records come from, comma-separated: file, stdin, http, nats (input.source)",
    )
    run.add_argument("--input", metavar="PATH", help="the file to follow (input.path)")
    run.add_argument("--listen", metavar="HOST:PORT", help="HTTP listener (server.listen)")
    run.add_argument("--checkpoint-dir", metavar="DIR", help="checkpoint.checkpoint_dir")
    run.add_argument(
        "--fresh", action="store_true", help="ignore existing checkpoints and start over"
    )
    run.add_argument(
        "--no-follow", action="store_true", help="stop at the end of the input (input.follow)"
    )
    run.add_argument(
        "--accept-gap",
        action="store_true",
        help="nats source: resume even though the stream's retention removed messages after "
        "the checkpoint; the gap is logged and counted (input.nats.accept_gap)",
    )
    _add_setting_options(run)
    run.set_defaults(func=_cmd_run)

    merge = sub.add_parser(
        "merge",
        help="a cluster's merger: one window, rules and alerts from the workers' pane summaries",
        description="Merge the pane summaries that cluster workers (cluster.role: worker) "
        "publish to NATS JetStream into one window, and run rules, alerts, sinks, metrics and "
        "the HTTP API on it: `run` with cluster.role: merger (README, 'When one process is not "
        "enough').",
    )
    merge.add_argument("--listen", metavar="HOST:PORT", help="HTTP listener (server.listen)")
    merge.add_argument("--checkpoint-dir", metavar="DIR", help="checkpoint.checkpoint_dir")
    merge.add_argument(
        "--fresh", action="store_true", help="ignore existing checkpoints and start over"
    )
    merge.add_argument(
        "--accept-gap",
        action="store_true",
        help="resume even though the summaries stream's retention removed messages after the "
        "checkpoint (input.nats.accept_gap)",
    )
    _add_setting_options(merge)
    merge.set_defaults(func=_cmd_merge)

    demo = sub.add_parser("demo", help="an invented shop's live feed, with alerts as they fire")
    demo.add_argument("--duration", type=float, default=45.0, help="seconds (default 45)")
    demo.add_argument("--forever", action="store_true", help="keep running until Ctrl-C")
    demo.add_argument("--json", action="store_true", help="print alert records as JSON lines")
    demo.add_argument("--listen", default="127.0.0.1:0", help="HTTP listener (default a free port)")
    demo.add_argument("--seed", type=int, default=7)
    demo.add_argument(
        "--levels",
        default="sku,product",
        help="catalogue levels counted, comma-separated (items.levels): sku, product, "
        "category (default sku,product; sku alone misses the planted product pattern)",
    )
    demo.add_argument(
        "--rate",
        type=float,
        default=None,
        help="orders per second (default: paced to fill --duration; 0: as fast as it can)",
    )
    demo.set_defaults(func=_cmd_demo)

    cc = sub.add_parser("check-config", help="validate a YAML config file")
    cc.add_argument("file")
    cc.set_defaults(func=_cmd_check_config)

    from streamcount.demo.generator import register_cli

    register_cli(sub)
    return parser


def main(argv: Sequence[str] | None = None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    try:
        return int(args.func(args))
    except (StreamcountError, OSError, ValueError) as exc:
        message = str(exc).splitlines()[0] if str(exc) else type(exc).__name__
        print(f"streamcount {args.command}: error: {message}", file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        return 130


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
