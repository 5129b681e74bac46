"""The live subcommands ``push`` and ``run``, and the demo's trip through Redis.

Thin: parse arguments, connect, call the producer or the service, print. ``cli.py`` calls
``add_live_commands`` to register them.
"""

from __future__ import annotations

import argparse
import json
import logging
import sys
import threading
from collections.abc import Callable
from pathlib import Path
from typing import Any

from .commands import progress_bar
from .config import Config, load_config
from .constants import partition_name
from .errors import AlerterError
from .producer import push_recording
from .records import Alert
from .replay import ReplayResult
from .service import Service, Summary
from .store import Store, connect

__all__ = ["add_live_commands", "cmd_push", "cmd_run", "live_replay", "alert_line", "demo_config"]

log = logging.getLogger(__name__)


def alert_line(alert: Alert) -> str:
    """One printed line per alert as it fires."""
    return (f"alert {alert.hour} {alert.kind:<5} {alert.node} observed={alert.observed:g} "
            f"expected={alert.expected:g} score={alert.score:+.1f} rule={alert.rule}")


def add_live_commands(sub: Any, common: Callable[[argparse.ArgumentParser], None]) -> None:
    """Register ``push`` and ``run`` on the ``alerter`` subcommand parser."""
    p = sub.add_parser("push", help="send a recording's counts and edge events into Redis")
    p.add_argument("recording", help="recording file (.jsonl or .jsonl.gz)")
    p.add_argument("--speed", type=float, default=0.0, metavar="N",
                   help="0 = as fast as possible (default), else N times real time")
    p.add_argument("--redis", metavar="URL", help="Redis URL (default: live.redis_url, else embedded server)")
    common(p)
    p.set_defaults(func=cmd_push)

    p = sub.add_parser("record", help="write the input streams in Redis as a recording, for replay")
    p.add_argument("out", help="recording file to write (.jsonl, or .jsonl.gz to compress)")
    p.add_argument("--redis", metavar="URL", help="Redis URL (default: live.redis_url, else embedded server)")
    common(p)
    p.set_defaults(func=cmd_record)

    p = sub.add_parser("run", help="the service: read Redis, close hours, write alerts to the outbox")
    p.add_argument("--until-drained", action="store_true", help="exit once the input stream is empty")
    p.add_argument("--redis", metavar="URL", help="Redis URL (default: live.redis_url, else embedded server)")
    p.add_argument("--partitions", metavar="LIST", help="partitions this worker owns, e.g. 0,2 (default: all)")
    p.add_argument("--consumer", metavar="NAME", help="consumer name in the group (default: live.consumer)")
    common(p)
    p.set_defaults(func=cmd_run)


def cmd_push(args: argparse.Namespace) -> int:
    if args.speed < 0:
        raise AlerterError(f"--speed {args.speed}: must be 0 (as fast as possible) or a positive factor")
    config = load_config(args.config)
    store = connect(config.live, args.redis)
    try:
        with progress_bar("pushing hours", not args.json) as on_hour:
            summary = push_recording(Path(args.recording), store, config.live, speed=args.speed,
                                     on_progress=on_hour)
    finally:
        store.close()
    figures = {"hours": summary.hours, "counts": summary.counts, "edges": summary.edges,
               "entries": summary.entries, "seconds": round(summary.seconds, 3)}
    if args.json:
        print(json.dumps(figures, sort_keys=True))
    else:
        print(f"pushed {summary.hours} hour(s), {summary.counts} count(s), {summary.edges} edge event(s) "
              f"in {summary.entries} entries to {store.where} in {summary.seconds:.2f} s")
    return 0


def cmd_record(args: argparse.Namespace) -> int:
    """Every partition's input stream, as the service applied it, into one recording."""
    from .export import export_streams

    config = load_config(args.config)
    out = Path(args.out)
    if not out.parent.is_dir():
        raise AlerterError(f"{out}: folder {out.parent} does not exist")
    store = connect(config.live, args.redis)
    try:
        with progress_bar("reading the input streams", not args.json) as on_entry:
            summary = export_streams(store, config.live, out, config.clock.timezone, on_entry=on_entry)
    finally:
        store.close()
    if args.json:
        print(json.dumps(summary.to_dict(), sort_keys=True))
    else:
        print(f"wrote {summary.hours} hour(s), {summary.counts} count(s) and {summary.edges} edge event(s) "
              f"from {summary.partitions} partition(s) of {store.where} to {out}; left out {summary.dead} "
              f"malformed and {summary.late} late of {summary.entries} entries")
    return 0


def _owned(text: str | None, total: int) -> list[int]:
    if text is None:
        return list(range(total))
    try:
        owned = sorted({int(part) for part in text.split(",") if part.strip()})
    except ValueError:
        raise AlerterError(f"--partitions {text!r}: expected comma-separated numbers such as 0,2") from None
    bad = [p for p in owned if not 0 <= p < total]
    if bad or not owned:
        raise AlerterError(f"--partitions {text!r}: each must be in 0..{total - 1} (live.partitions is {total})")
    return owned


def run_services(config: Config, store: Store, partitions: list[int], *, drained: bool,
                 consumer: str | None = None, on_alert: Callable[[Alert], None] | None = None,
                 settle_heap: bool = False) -> list[Service]:
    """Run one Service per owned partition (threads when more than one) until done; with
    ``settle_heap`` the first of them freezes the process's settled heap (see heap)."""
    services = [Service(config, store, partition=p, drained=drained, consumer=consumer, on_alert=on_alert,
                        settle_heap=settle_heap and k == 0) for k, p in enumerate(partitions)]
    if len(services) == 1:
        services[0].run()
        return services
    import signal

    def stop_all(*_: object) -> None:
        for s in services:
            s.stop()

    signal.signal(signal.SIGTERM, stop_all)
    signal.signal(signal.SIGINT, stop_all)
    errors: list[BaseException] = []

    def target(s: Service) -> None:
        try:
            s.run(install_signals=False)
        except BaseException as exc:  # noqa: BLE001 - reported below, and stops the others
            errors.append(exc)
            stop_all()

    threads = [threading.Thread(target=target, args=(s,), name=f"partition-{s.partition}") for s in services]
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    if errors:
        raise errors[0]
    return services


def cmd_run(args: argparse.Namespace) -> int:
    config = load_config(args.config)
    store = connect(config.live, args.redis)
    printer = None if args.json else (lambda a: print(alert_line(a), flush=True))
    try:
        services = run_services(config, store, _owned(args.partitions, config.live.partitions),
                                drained=args.until_drained, consumer=args.consumer, on_alert=printer,
                                settle_heap=True)
    finally:
        store.close()
    totals: dict[str, int] = {}
    for s in services:
        for key, value in s.summary.counters.items():
            totals[key] = totals.get(key, 0) + value
    hours = sum(len(s.summary.hours) for s in services)
    alerts = sum(len(s.summary.alerts) for s in services)
    if args.json:
        print(json.dumps({"hours": hours, "alerts": alerts, "counters": totals}, sort_keys=True))
    else:
        print(f"run: closed {hours} hour(s), {alerts} alert(s); dead letters {totals.get('dead', 0)}, "
              f"late entries {totals.get('late', 0)}, skipped (already applied) {totals.get('skipped', 0)}")
    return 0


# --- the demo through Redis ----------------------------------------------------------------

def demo_config(config: Config) -> Config:
    """The config with every name moved under ``alerter-demo:`` so a demo never meets live data."""
    names = config.live.names
    moved = {k: v.replace("alerter", "alerter-demo", 1) if k != "group" else v
             for k, v in names.model_dump().items()}
    live = config.live.model_copy(update={"names": names.model_copy(update=moved)})
    return config.model_copy(update={"live": live})


def _clear(store: Store, config: Config) -> None:
    names = config.live.names
    keys = [partition_name(t, p) for p in range(config.live.partitions)
            for t in (names.input, names.outbox, names.dead_letter, names.late, names.checkpoint)]
    store._do("DEL demo keys", lambda: store.client.delete(*keys))


def live_replay(recording: Path, config: Config, store: Store,
                on_alert: Callable[[Alert], None] | None = None, show_progress: bool = True) -> ReplayResult:
    """Push a recording through Redis and run the service until drained (the demo's path)."""
    _clear(store, config)
    with progress_bar("pushing hours", show_progress) as on_hour:
        push_recording(recording, store, config.live, on_progress=on_hour)
    services = run_services(config, store, list(range(config.live.partitions)), drained=True, on_alert=on_alert)
    summaries: list[Summary] = [s.summary for s in services]
    alerts = sorted((a for s in summaries for a in s.alerts), key=lambda a: (a.hour, a.kind, a.node))
    incidents = sorted((u for s in summaries for u in s.incidents),
                       key=lambda u: (u.hour, u.incident, u.revision))
    hours = sorted(set(h for s in summaries for h in s.hours))
    result = ReplayResult(alerts=alerts, incidents=incidents, hours=hours)
    result.engine = services[0].state.engine
    return result


def print_alert_stderr(alert: Alert) -> None:
    print(alert_line(alert), file=sys.stderr, flush=True)
