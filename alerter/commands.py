"""What each CLI command does, written against the library so tests can call it directly."""

from __future__ import annotations

import argparse
import json
import sys
import tempfile
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from dataclasses import replace
from datetime import datetime, timedelta
from pathlib import Path

from rich.progress import BarColumn, MofNCompleteColumn, Progress, TextColumn, TimeElapsedColumn

from . import report
from .compare import Comparison, compare_runs
from .config import Config, load_config
from .errors import AlerterError, HourRangeError, RecordingError
from .records import write_jsonl
from .replay import ReplayResult, replay
from .scoring import load_labels, score_alerts
from .timeaxis import format_hour, hour_index, parse_hour, within

ROOT = Path(__file__).resolve().parent.parent
DEMO_RECORDING = ROOT / "replay_data" / "demo_week.jsonl.gz"
DEMO_LABELS = ROOT / "replay_data" / "demo_labels.json"


@contextmanager
def progress_bar(label: str, enabled: bool = True) -> Iterator[Callable[[int, int | None], None]]:
    """A progress bar on stderr; yields the ``on_hour(done, total)`` callback."""
    if not enabled or not sys.stderr.isatty():
        yield lambda done, total: None
        return
    columns = (TextColumn(label), BarColumn(), MofNCompleteColumn(), TimeElapsedColumn())
    with Progress(*columns, console=report.console(stderr=True), transient=True) as bar:
        task = bar.add_task(label, total=None)

        def on_hour(done: int, total: int | None) -> None:
            bar.update(task, completed=done, total=total)

        yield on_hour


@contextmanager
def recording_of(args: argparse.Namespace, config: Config) -> Iterator[Path]:
    """The recording a command reads: the file given, or with ``--live`` the input streams in
    Redis written to a temporary file first (see :mod:`alerter.export`)."""
    if args.live == (args.recording is not None):
        raise AlerterError("give a RECORDING file or --live (the input streams in Redis)"
                           + (", not both" if args.live else ""))
    if not args.live:
        yield Path(args.recording)
        return
    from .export import export_streams
    from .store import connect

    with tempfile.TemporaryDirectory(prefix="alerter-live-") as folder:
        path = Path(folder) / "live.jsonl"
        store = connect(config.live, args.redis)
        try:
            summary = export_streams(store, config.live, path, config.clock.timezone)
        finally:
            store.close()
        if summary.hours == 0:
            raise AlerterError(f"--live: the input streams at {store.where} ({config.live.names.input}, "
                               f"{config.live.partitions} partition(s)) hold no counts; push some first, or check "
                               "--redis, live.redis_url and live.names")
        yield path


def _report_bad(result: ReplayResult) -> None:
    for error in result.bad_lines[:20]:
        print(f"alerter: skipped bad line {error}", file=sys.stderr)
    if len(result.bad_lines) > 20:
        print(f"alerter: ... {len(result.bad_lines) - 20} more bad lines skipped", file=sys.stderr)


def own_only(config: Config) -> Config:
    """The same config with the flow model off: the seasonal baseline alone."""
    return config.model_copy(update={"flows": config.flows.model_copy(update={"enabled": False})})


def present(result: ReplayResult, recording: Path, args: argparse.Namespace, config: Config,
            labels: Path | None, compare_own_only: bool = False, score_from: ReplayResult | None = None) -> int:
    """Write alerts, then print tables (or one JSON object) and the score against labels
    (of ``score_from`` when given: a window's result is scored over the labelled period)."""
    if args.out:
        write_jsonl(args.out, result.alerts)
    lab = load_labels(labels) if labels else None
    slack = config.scoring.slack_hours
    scored = score_from or result
    score = score_alerts(scored.alerts, lab, slack, scored.incidents) if lab else None
    baseline_only = None
    if lab is not None and compare_own_only and config.flows.enabled:
        own = replay(recording, own_only(config))
        baseline_only = score_alerts(own.alerts, lab, slack, own.incidents)
    if args.json:
        span = result.span
        print(json.dumps({
            "recording": str(recording), "hours": len(result.hours),
            "nodes": len(result.engine.nodes) if result.engine else 0,
            "span": [format_hour(span[0]), format_hour(span[1])] if span else None,
            "alerts": len(result.alerts), "bad_lines": len(result.bad_lines),
            "incidents": len({u.incident for u in result.incidents}),
            "score": score.to_dict() if score else None,
            "score_own_only": baseline_only.to_dict() if baseline_only else None,
        }, indent=2, sort_keys=True))
        return 0
    out = report.console()
    out.print(report.alerts_table(result.alerts, args.show))
    out.print(report.incidents_table(result.incidents))
    if result.spills:
        out.print(report.spills_table(result.spills))
    out.print(report.ESTIMATE_NOTE)
    if args.out:
        out.print(f"wrote {len(result.alerts)} alert(s) to {args.out}")
    if score:
        for table in report.score_tables(score, baseline_only):
            out.print(table)
    return 0


def windowed(result: ReplayResult, since: datetime | None, until: datetime | None) -> ReplayResult:
    """The result with only the alerts, incident updates and spill-over warnings of the hours
    ``since <= hour <= until`` (either end open when None); the engine ran over everything."""
    return replace(result, alerts=[a for a in result.alerts if within(a.hour, since, until)],
                   incidents=[u for u in result.incidents if within(u.hour, since, until)],
                   spills=[w for w in result.spills if within(w.hour, since, until)])


def cmd_replay(args: argparse.Namespace) -> int:
    config = load_config(args.config)
    since, until = _hour_option(args.since, "--since"), _hour_option(args.until, "--until")
    if since is not None and until is not None and until < since:
        raise HourRangeError(f"--until {args.until} is before --since {args.since}")
    with recording_of(args, config) as recording, progress_bar("replaying hours", not args.json) as on_hour:
        result = replay(recording, config, skip_bad=args.skip_bad, on_hour=on_hour)
    _report_bad(result)
    labels = Path(args.labels) if args.labels else None
    shown = Path("live") if args.live else recording
    if since is None and until is None:
        return present(result, shown, args, config, labels)
    return present(windowed(result, since, until), shown, args, config, labels, score_from=result)


def cmd_demo(args: argparse.Namespace) -> int:
    """Push the bundled demo week through Redis, run the service to the end, score it."""
    if not DEMO_RECORDING.exists():
        raise RecordingError(str(DEMO_RECORDING), None,
                             "the bundled demo recording is missing; run 'alerter scenario' to make it")
    from .live_cli import alert_line, demo_config, live_replay
    from .store import connect

    config = demo_config(load_config(args.config))
    store = connect(config.live)  # live.redis_url, else the embedded server (stopped again below)
    printer = None if args.json else (lambda a: print(alert_line(a), flush=True))
    try:
        result = live_replay(DEMO_RECORDING, config, store, on_alert=printer, show_progress=not args.json)
    finally:
        store.close(stop_server=True)
    if not args.json:
        from .messages import render_demo_messages

        messages = render_demo_messages(result.alerts, result.incidents)
        out = report.console()
        out.rule(f"{len(messages)} chat message(s) for the demo week: one per incident, then its updates")
        for text in messages:
            out.print(text, markup=False, highlight=False, soft_wrap=True)  # a long line stays one line
            out.print()
    return present(result, DEMO_RECORDING, args, config, DEMO_LABELS, compare_own_only=True)


def cmd_explain(args: argparse.Namespace) -> int:
    config = load_config(args.config)
    try:
        at = parse_hour(args.at)
    except ValueError as exc:
        raise HourRangeError(f"--at: {exc}") from None
    with recording_of(args, config) as recording, progress_bar("replaying hours", not args.json) as on_hour:
        result = replay(recording, config, skip_bad=args.skip_bad, watch=(args.node,), on_hour=on_hour)
    _report_bad(result)
    assert result.engine is not None
    result.engine.nodes.get(args.node)  # raises UnknownNodeError with suggestions
    span = result.span
    if span is None or not span[0] <= at <= span[1]:
        bounds = f"{format_hour(span[0])} .. {format_hour(span[1])}" if span else "no hours"
        raise HourRangeError(f"--at {args.at} is outside the recording ({bounds})")
    lo, hi = at - timedelta(hours=args.window), at + timedelta(hours=args.window)
    rows = [r for r in result.trace.get(args.node, []) if lo <= parse_hour(r.hour) <= hi]
    if args.json:
        print(json.dumps({"node": args.node, "at": format_hour(at), "hours": [r.to_dict() for r in rows]},
                         indent=2, sort_keys=True))
    else:
        out = report.console()
        out.print(report.history_table(args.node, rows, format_hour(at)))
        current = next((r for r in rows if r.hour == format_hour(at)), None)
        if current is not None and current.own_expected is not None:
            out.print(report.decomposition_table(current))
        engine = result.engine
        table = engine.joint.neighbourhood(args.node, 1, "up", hour_index(at))
        out.print(report.graph_table(args.node, table, "up", 10))
        out.print(report.ESTIMATE_NOTE)
    if args.plot:
        from .plots import plot_history

        plot_history(args.node, rows, format_hour(at), args.plot)
        if not args.json:
            print(f"wrote plot to {args.plot}")
    return 0


def _hour_option(text: str | None, what: str) -> datetime | None:
    if text is None:
        return None
    try:
        return parse_hour(text)
    except ValueError as exc:
        raise HourRangeError(f"{what}: {exc}") from None


def cmd_compare(args: argparse.Namespace) -> int:
    """Replay one recording under the current and the proposed config; what would change."""
    current, proposed = load_config(args.base), load_config(args.config)
    runs = []
    with recording_of(args, current) as recording:
        for name, cfg in (("current", current), ("proposed", proposed)):
            with progress_bar(f"replaying with the {name} config", not args.json) as on_hour:
                runs.append(replay(recording, cfg, skip_bad=args.skip_bad, on_hour=on_hour))
    recording = Path("live") if args.live else recording
    _report_bad(runs[0])
    labels = load_labels(args.labels) if args.labels else None
    since = _hour_option(args.since, "--since") or (labels.labelled_from if labels else None)
    cmp = compare_runs(current, proposed, [(r.alerts, r.incidents) for r in runs], labels, since)
    names = (args.base or "defaults", args.config)
    if args.plot:
        from .plots import plot_comparison

        d = cmp.diff
        events = [(e.start, e.end) for e in labels.events if since is None or e.end >= since] if labels else []
        plot_comparison(d.kept, d.dropped, d.added, cmp.truth if labels else {}, events,
                        f"{names[1]} against {names[0]}: {len(d.dropped)} dropped, {len(d.added)} added, "
                        f"{len(d.kept)} in both", args.plot)
    if args.json:
        print(json.dumps({"recording": str(recording), "current_config": names[0], "proposed_config": names[1],
                          **cmp.to_dict()}, indent=2, sort_keys=True))
        return 0
    _print_comparison(cmp, args, labelled_run=labels is not None)
    if args.plot:
        print(f"wrote plot to {args.plot}")
    return 0


def _print_comparison(cmp: Comparison, args: argparse.Namespace, labelled_run: bool) -> None:
    out = report.console()
    window = f"from {format_hour(cmp.since)} on" if cmp.since else "over the whole recording"
    out.print(f"current config: {args.base or 'defaults (config/default.yaml)'}; proposed: {args.config}")
    out.print(report.settings_table(cmp.settings) if cmp.settings else "the two configs set every key alike")
    out.print(report.sides_table(cmp.counts, cmp.scores, len(cmp.diff.kept), window))
    for name, alerts in (("dropped", cmp.diff.dropped), ("added", cmp.diff.added)):
        verdicts = cmp.truth[name]
        if not alerts:
            out.print(f"no alert {name} by the proposed config")
            continue
        out.print(report.alerts_table(list(alerts), args.show, title=f"{name} by the proposed config",
                                      truth=verdicts if labelled_run else None))
        if labelled_run:
            out.print(f"{name}: {verdicts.count(True)} on labelled events, {verdicts.count(False)} false alarm(s)")
    if not labelled_run:
        out.print("give --labels FILE to see which dropped or added alerts fall on labelled events")


def cmd_scenario(args: argparse.Namespace) -> int:
    from .scenario import generate, write_scenario

    scenario = generate(seed=args.seed)
    paths = write_scenario(scenario, Path(args.out))
    for path in paths if isinstance(paths, (list, tuple)) else [paths]:
        print(f"wrote {path}")
    return 0


def cmd_graph(args: argparse.Namespace) -> int:
    """Replay to learn the flows, then list a node's neighbourhood with its learned shares."""
    if args.hops < 1:
        raise AlerterError(f"--hops {args.hops}: must be 1 or more")
    config = load_config(args.config)
    with recording_of(args, config) as recording, progress_bar("replaying hours", not args.json) as on_hour:
        result = replay(recording, config, skip_bad=args.skip_bad, on_hour=on_hour)
    _report_bad(result)
    engine = result.engine
    assert engine is not None and engine.last_hour is not None
    engine.nodes.get(args.node)  # raises UnknownNodeError with suggestions
    rows = engine.joint.neighbourhood(args.node, args.hops, args.direction, hour_index(engine.last_hour))
    if args.json:
        keys = ("hops", "node", "via", "share", "link_age_hours")
        print(json.dumps({"node": args.node, "direction": args.direction,
                          "as_of": format_hour(engine.last_hour),
                          "neighbours": [dict(zip(keys, r, strict=True)) for r in rows]},
                         indent=2, sort_keys=True))
        return 0
    out = report.console()
    out.print(report.graph_table(args.node, rows, args.direction, args.show))
    out.print(f"learned shares as of {format_hour(engine.last_hour)}; {report.ESTIMATE_NOTE}")
    return 0
