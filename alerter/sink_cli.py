"""The ``alerter sinks run|test`` and ``alerter outbox`` subcommands (thin: parse, call, print).

``cli.py`` calls ``add_sink_commands(sub, common)`` to register them.
"""

from __future__ import annotations

import argparse
import json
import threading
import time
from collections.abc import Callable
from typing import Any

from .config import Config, load_config
from .constants import partition_name
from .delivery import SinkKeys, sink_keys
from .delivery_threads import run_delivery
from .digest import start_digest_job
from .errors import AlerterError, SinkError
from .incidents import IncidentUpdate
from .messages import render_update
from .records import Alert, Upstream
from .sinks import Outgoing, build_sink
from .store import Entry, Store, connect, id_key

__all__ = ["add_sink_commands", "sample_message"]


def add_sink_commands(sub: Any, common: Callable[[argparse.ArgumentParser], None]) -> None:
    """Register ``sinks`` (run, test) and ``outbox`` on the ``alerter`` subcommand parser."""
    p = sub.add_parser("sinks", help="deliver the outbox to the configured sinks, or test them")
    inner = p.add_subparsers(dest="sinks_command", required=True, metavar="ACTION")
    q = inner.add_parser("run", help="deliver outbox entries to every enabled sink")
    q.add_argument("--until-drained", action="store_true", help="exit once every sink has read the outbox")
    q.add_argument("--redis", metavar="URL", help="Redis URL (default: live.redis_url, else embedded server)")
    common(q)
    q.set_defaults(func=cmd_sinks_run)
    q = inner.add_parser("test", help="post a sample message to every configured sink and show the answers")
    q.add_argument("--redis", metavar="URL", help="Redis URL (needed by redis_stream sinks)")
    common(q)
    q.set_defaults(func=cmd_sinks_test)
    p = sub.add_parser("outbox", help="list recent outbox entries and their delivery state per sink")
    p.add_argument("--limit", type=int, default=20, metavar="N", help="entries to list (default 20)")
    p.add_argument("--partition", type=int, default=0, metavar="P", help="partition (default 0)")
    p.add_argument("--redis", metavar="URL", help="Redis URL (default: live.redis_url, else embedded server)")
    common(p)
    p.set_defaults(func=cmd_outbox)


def sample_message() -> Outgoing:
    """A made-up incident used by ``sinks test``; its ids say that it is a test."""
    hour = time.strftime("%Y-%m-%dT%H:00:00Z", time.gmtime())
    alert = Alert.build(node="/sinks-test/page", hour=hour, kind="surge", observed=3400, expected=1000,
                        band_low=800, band_high=1300, score=9.1, rule="default", streak=1,
                        upstream=(Upstream("/sinks-test/home", 1250.0, 0.52, "new"),), unexplained=1150,
                        origin="mixed")
    update = IncidentUpdate(incident="test-incident", revision=1, hour=hour, state="open", direction="surge",
                            root=alert.node, start=hour, members=(alert.node,), new_members=(alert.node,),
                            total_excess=alert.excess)
    r = render_update(update, [alert])
    return Outgoing(f"test|{int(time.time() * 1000)}", "test", hour, r.title, "(test message) " + r.text,
                    r.thread, 1, "open", alert.node, update.to_dict())


def cmd_sinks_run(args: argparse.Namespace) -> int:
    config = load_config(args.config)
    if not config.sinks.targets:
        raise AlerterError("no sinks configured: add entries under sinks.targets in the YAML config")
    store = connect(config.live, args.redis)
    stop = threading.Event()
    # the daily digest runs beside a long-lived delivery process, not a drain-and-exit one
    digest = start_digest_job(config, store) if config.sinks.digest.enabled and not args.until_drained else None
    try:
        workers = run_delivery(config, store, drained=args.until_drained, stop=stop)
    except KeyboardInterrupt:
        stop.set()
        raise
    finally:
        if digest is not None:
            digest.shutdown(wait=False)
        store.close()
    rows = {f"{w.target.name}/p{w.partition}": w.counters for w in workers}
    print(json.dumps(rows, sort_keys=True) if args.json else
          "\n".join(f"{k}: " + ", ".join(f"{a}={b}" for a, b in sorted(v.items())) for k, v in rows.items()))
    return 0


def cmd_sinks_test(args: argparse.Namespace) -> int:
    config = load_config(args.config)
    if not config.sinks.targets:
        raise AlerterError("no sinks configured: add entries under sinks.targets in the YAML config")
    needs_redis = any(t.kind == "redis_stream" for t in config.sinks.targets)
    store = connect(config.live, args.redis) if needs_redis else None
    msg, results, failed = sample_message(), {}, 0
    for target in config.sinks.targets:
        try:
            sent = build_sink(target, store).send(msg)
            results[target.name] = {"ok": True, "status": sent.status, "answer": sent.detail[:200]}
        except SinkError as exc:
            failed += 1
            results[target.name] = {"ok": False, "error": str(exc)}
    if store is not None:
        store.close()
    if args.json:
        print(json.dumps(results, sort_keys=True))
    else:
        for name, r in results.items():
            outcome = f"ok status={r['status']} answer={r['answer']!r}" if r["ok"] else f"FAILED {r['error']}"
            print(f"{name}: " + outcome)
    return 1 if failed else 0


def _states(config: Config, store: Store, partition: int, entries: list[Entry]) -> dict[bytes, dict[str, str]]:
    """Per entry and sink: delivered, dead, pending, acked (joined/folded/held) or unread."""
    out: dict[bytes, dict[str, str]] = {eid: {} for eid, _ in entries}
    for target in config.sinks.targets:
        k = sink_keys(config, target.name, partition)
        for eid, state in _sink_states(store, k, target.name, entries).items():
            out[eid][target.name] = state
    return out


def _sink_states(store: Store, k: SinkKeys, sink: str, entries: list[Entry]) -> dict[bytes, str]:
    """The delivery state of each entry for one sink (its Redis names in ``k``).

    An entry is ``delivered`` when its key is in the delivered-set, ``dead`` when the sink
    gave up on it, ``pending`` when read but not acknowledged, ``acked`` when the sink
    passed it (joined into an update, folded, held back by routing), else ``unread``.
    Spill-over entries are delivered under their note's key, so they show as ``acked``.
    """
    group = next((g for g in store.groups(k.outbox) if g["name"].decode() == k.group), None)
    pending = store.pending_ids(k.outbox, k.group) if group is not None and group["pending"] else set()
    dead = {f[b"key"] for _, f in store.recent(k.dead, 10000) if f.get(b"sink") == sink.encode()}  # shared stream
    last = id_key(group["last-delivered-id"]) if group else (0, 0)
    out: dict[bytes, str] = {}
    for eid, fields in entries:
        key = fields.get(b"key", b"")
        if store.is_delivered(k.delivered, key):
            state = "delivered"
        elif key in dead:
            state = "dead"
        elif eid in pending:
            state = "pending"
        elif group is not None and id_key(eid) <= last:
            state = "acked"
        else:
            state = "unread"
        out[eid] = state
    return out


def cmd_outbox(args: argparse.Namespace) -> int:
    config = load_config(args.config)
    store = connect(config.live, args.redis)
    try:
        stream = partition_name(config.live.names.outbox, args.partition)
        entries = list(reversed(store.recent(stream, max(1, args.limit))))  # oldest first
        states = _states(config, store, args.partition, entries)
    finally:
        store.close()
    rows: list[dict[str, Any]] = [
        {"id": eid.decode(), "type": f.get(b"type", b"").decode(), "key": f.get(b"key", b"").decode(),
         "hour": f.get(b"hour", b"").decode(), "sinks": states[eid]} for eid, f in entries]
    if args.json:
        print(json.dumps(rows, sort_keys=True, ensure_ascii=False))
    else:
        print(f"{len(rows)} recent entr{'y' if len(rows) == 1 else 'ies'} of {stream}")
        for r in rows:
            sinks = " ".join(f"{k}={v}" for k, v in sorted(r["sinks"].items())) or "(no sinks configured)"
            print(f"{r['id']:<16} {r['type']:<8} {r['hour']:<21} {r['key']!r:<50} {sinks}")
    return 0



