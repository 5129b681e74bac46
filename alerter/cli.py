"""The ``alerter`` command: parse arguments, call the library, map errors to exit codes."""

from __future__ import annotations

import argparse
import json
import logging
import sys
from collections.abc import Callable, Sequence
from pathlib import Path

from . import commands
from .errors import AlerterError

LOG_FORMAT = "%(asctime)s %(levelname)s %(name)s %(message)s"


def _common(p: argparse.ArgumentParser) -> None:
    p.add_argument("--config", metavar="FILE", help="YAML config (default: config/default.yaml)")
    p.add_argument("--json", action="store_true", help="print figures as JSON for scripts")


def _source(p: argparse.ArgumentParser) -> None:
    """A recording file, or --live: the input streams in Redis as ``alerter record`` writes them."""
    p.add_argument("recording", nargs="?", help="recording file (.jsonl or .jsonl.gz); or give --live")
    p.add_argument("--live", action="store_true",
                   help="read the input streams in Redis instead of a file (all partitions, from the start)")
    p.add_argument("--redis", metavar="URL",
                   help="with --live: Redis URL (default: live.redis_url, else embedded)")


def _parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="alerter",
        description="Surge and drop alerts over a link graph of hourly counts.",
    )
    parser.add_argument("-v", "--verbose", action="store_true", help="log debug lines to stderr")
    sub = parser.add_subparsers(dest="command", required=True, metavar="COMMAND")

    p = sub.add_parser("replay", help="run the engine over a recording and list its alerts")
    _source(p)
    p.add_argument("--out", metavar="FILE", help="write alerts as JSON Lines to FILE")
    p.add_argument("--labels", metavar="FILE", help="score the alerts against labelled events")
    p.add_argument("--skip-bad", action="store_true", help="report and skip malformed lines instead of stopping")
    p.add_argument("--show", type=int, default=40, metavar="N", help="alerts to show in the table (default 40)")
    p.add_argument("--since", metavar="HOUR", help="show and write only what happened from this UTC hour on "
                   "(the engine still learns from the whole recording)")
    p.add_argument("--until", metavar="HOUR", help="... up to and including this UTC hour")
    _common(p)
    p.set_defaults(func=commands.cmd_replay)

    p = sub.add_parser("explain", help="show a node's expected value, band and residuals around an hour")
    p.add_argument("node", help="node id, e.g. /news")
    p.add_argument("--at", required=True, metavar="HOUR", help="UTC hour, e.g. 2026-11-18T15:00:00Z")
    _source(p)
    p.add_argument("--window", type=int, default=12, metavar="H", help="hours either side (default 12)")
    p.add_argument("--plot", metavar="PNG", help="also draw the history to a PNG file")
    p.add_argument("--skip-bad", action="store_true", help="report and skip malformed lines")
    _common(p)
    p.set_defaults(func=commands.cmd_explain)

    p = sub.add_parser("graph", help="list a node's neighbourhood with the learned link shares")
    p.add_argument("node", help="node id, e.g. /news")
    _source(p)
    p.add_argument("--hops", type=int, default=1, metavar="K", help="links away from the node (default 1)")
    p.add_argument("--direction", choices=("up", "down"), default="down",
                   help="up = who sends it visitors, down = where its visitors go (default down)")
    p.add_argument("--show", type=int, default=50, metavar="N", help="rows to show (default 50)")
    p.add_argument("--skip-bad", action="store_true", help="report and skip malformed lines")
    _common(p)
    p.set_defaults(func=commands.cmd_graph)

    p = sub.add_parser("compare", help="what a proposed config would change: alerts dropped and added, settings")
    _source(p)
    p.add_argument("--config", required=True, metavar="FILE", help="the proposed YAML config")
    p.add_argument("--base", metavar="FILE", help="the config in use (default: config/default.yaml)")
    p.add_argument("--labels", metavar="FILE", help="labelled events: mark true alerts, score both")
    p.add_argument("--since", metavar="HOUR", help="compare alerts from this UTC hour on "
                   "(default: the labelled period with --labels, else the whole recording)")
    p.add_argument("--show", type=int, default=40, metavar="N", help="alerts to show per table (default 40)")
    p.add_argument("--plot", metavar="PNG", help="also draw both configs' alerts along time to a PNG file")
    p.add_argument("--skip-bad", action="store_true", help="report and skip malformed lines")
    p.add_argument("--json", action="store_true", help="print figures as JSON for scripts")
    p.set_defaults(func=commands.cmd_compare)

    p = sub.add_parser("demo", help="run the bundled demo week (Fernhollow Courier) and score it")
    p.add_argument("--out", metavar="FILE", help="write alerts as JSON Lines to FILE")
    p.add_argument("--show", type=int, default=25, metavar="N", help="alerts to show (default 25)")
    _common(p)
    p.set_defaults(func=commands.cmd_demo)

    p = sub.add_parser("scenario", help="regenerate the invented demo recording and its labels")
    p.add_argument("--seed", type=int, default=20261102, help="random seed (default 20261102)")
    p.add_argument("--out", default="replay_data", metavar="DIR", help="output folder (default replay_data)")
    p.set_defaults(func=commands.cmd_scenario)

    try:
        from .live_cli import add_live_commands
    except ImportError:  # the live path is optional until its module lands
        pass
    else:
        add_live_commands(sub, _common)
    from .sink_cli import add_sink_commands  # sinks, outbox

    add_sink_commands(sub, _common)
    return parser


def _parse(parser: argparse.ArgumentParser, argv: Sequence[str] | None) -> argparse.Namespace:
    """``parse_args``, except that a RECORDING given after options (``explain NODE --at HOUR
    FILE``) still lands in ``recording``: argparse fills an optional positional at the first
    positional it meets, so without this the file would be an unrecognised argument."""
    args, extra = parser.parse_known_args(argv)
    if len(extra) == 1 and not extra[0].startswith("-") and getattr(args, "recording", "") is None:
        args.recording = extra[0]
    elif extra:
        parser.error(f"unrecognized arguments: {' '.join(extra)}")
    return args


def main(argv: Sequence[str] | None = None) -> int:
    """Entry point of the console script; returns the exit code."""
    args = _parse(_parser(), argv)
    logging.basicConfig(level=logging.DEBUG if args.verbose else logging.WARNING,
                        format=LOG_FORMAT, stream=sys.stderr)
    func: Callable[[argparse.Namespace], int] = args.func
    try:
        return func(args)
    except AlerterError as exc:
        print(f"alerter: error: {exc}", file=sys.stderr)
        return exc.exit_code
    except KeyboardInterrupt:
        print("alerter: interrupted", file=sys.stderr)
        return 130
    except BrokenPipeError:
        return 0


def write_json(data: object) -> None:
    json.dump(data, sys.stdout, indent=2, sort_keys=True)
    sys.stdout.write("\n")


def default_path(name: str) -> Path:
    return Path(__file__).resolve().parent.parent / name


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
