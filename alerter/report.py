"""Readable terminal output: alert tables, scores and a node's history (rich)."""

from __future__ import annotations

import json
from collections.abc import Sequence

from rich.console import Console
from rich.table import Table

from .incidents import IncidentUpdate
from .messages import human_number, percent_above
from .records import Alert, NodeHour, SpillWarning, Upstream
from .scoring import Score

__all__ = ["alerts_table", "score_tables", "history_table", "incidents_table", "decomposition_table",
           "graph_table", "spills_table", "settings_table", "sides_table", "human"]

ESTIMATE_NOTE = ("Upstream shares and kinds are estimates from how counts moved together in the past; "
                 "they do not prove cause.")


def human(value: float | None) -> str:
    """A count rounded for people (the chat messages' rounding); ``-`` for no value.

    >>> human(1234.0), human(950.0), human(3_400_000.0), human(None)
    ('1.2k', '950', '3.4M', '-')
    """
    return "-" if value is None else human_number(value)


def alerts_table(alerts: Sequence[Alert], limit: int = 40, title: str = "",
                 truth: Sequence[bool | None] | None = None) -> Table:
    """The first ``limit`` alerts, one row each; with ``truth`` a column saying whether each
    falls on a labelled event."""
    head = f"{len(alerts)} alert(s)" + (f" {title}" if title else "")
    table = Table(title=head + (f", first {limit} shown" if len(alerts) > limit else ""), title_justify="left")
    columns = [("hour (UTC)", "left"), ("node", "left"), ("kind", "left"), ("observed", "right"),
               ("expected", "right"), ("band", "right"), ("change", "right"), ("score", "right"),
               ("origin", "left"), ("likely upstream (est.)", "left")]
    if truth is not None:
        columns.append(("labelled event", "left"))
    for name, justify in columns:
        table.add_column(name, justify=justify)  # type: ignore[arg-type]
    for k, a in enumerate(alerts[:limit]):
        cells = [a.hour, a.node, a.kind, human(a.observed), human(a.expected),
                 f"{human(a.band_low)}..{human(a.band_high)}", percent_above(a.observed, a.expected),
                 f"{a.score:+.1f}", a.origin or "-", upstream_text(a.upstream)]
        if truth is not None:
            cells.append({True: "yes", False: "no (false alarm)", None: "-"}[truth[k]])
        table.add_row(*cells)
    return table


def settings_table(changes: Sequence[tuple[str, object, object]]) -> Table:
    """The settings two configs differ in (dotted keys)."""
    table = Table(title=f"{len(changes)} setting(s) differ", title_justify="left")
    for col in ("setting", "current", "proposed"):
        table.add_column(col)
    for key, a, b in changes:
        table.add_row(key, _setting(a), _setting(b))
    return table


def _setting(value: object) -> str:
    return "(not set)" if value is None else json.dumps(value) if isinstance(value, (list, dict)) else str(value)


def sides_table(counts: Sequence[dict[str, int]], scores: Sequence[Score | None], kept: int, window: str) -> Table:
    """Alerts, incidents and (with labels) the score of the current and the proposed config."""
    table = Table(title=f"{window}: {kept} alert(s) in both", title_justify="left")
    for col in ("figure", "current", "proposed", "change"):
        table.add_column(col, justify="left" if col == "figure" else "right")
    for name, label in (("alerts", "alerts"), ("surge", "  surges"), ("drop", "  drops"),
                        ("incidents", "incidents opened (chat threads)")):
        a, b = counts[0][name], counts[1][name]
        table.add_row(label, str(a), str(b), f"{b - a:+d}")
    if scores[0] is not None and scores[1] is not None:
        for name, value in scores[0].summary.items():
            if name in ("incidents", "incidents_per_event"):
                continue
            other = scores[1].summary.get(name, float("nan"))
            change = "n/a" if value != value or other != other else f"{other - value:+.2f}"
            table.add_row(name.replace("_", " "), _pct(value), _pct(other), change)
    return table


def upstream_text(upstream: Sequence[Upstream]) -> str:
    """``/news 62% (new link)`` style list of named upstream neighbours."""
    parts = []
    for u in upstream:
        link = f" ({u.link} link)" if u.link else ""
        parts.append(f"{u.node} {u.share * 100:.0f}%{link}")
    return ", ".join(parts) or "-"


def incidents_table(updates: Sequence[IncidentUpdate], limit: int = 30) -> Table:
    """The latest state of each incident, in order of start."""
    latest: dict[str, IncidentUpdate] = {}
    for u in updates:
        latest[u.incident] = u
    rows = sorted(latest.values(), key=lambda u: (u.start, u.incident))
    title = f"{len(rows)} incident(s)" + (f", first {limit} shown" if len(rows) > limit else "")
    table = Table(title=title, title_justify="left")
    for col in ("incident", "kind", "root (est.)", "members", "excess", "start (UTC)", "last update", "state"):
        table.add_column(col, justify="right" if col in ("members", "excess") else "left")
    for u in rows[:limit]:
        table.add_row(u.incident, u.direction, u.root, str(len(u.members)), human(u.total_excess),
                      u.start, u.hour, u.state)
    return table


def spills_table(spills: Sequence[SpillWarning], limit: int = 20) -> Table:
    table = Table(title=f"{len(spills)} spill-over warning(s)", title_justify="left")
    for col in ("hour (UTC)", "node", "forecast", "capacity", "incident", "via"):
        table.add_column(col)
    for w in spills[:limit]:
        table.add_row(w.hour, w.node, human(w.forecast), human(w.capacity), w.incident, w.via)
    return table


def decomposition_table(row: NodeHour) -> Table:
    """Observed against own expectation, neighbours' part and what is left unexplained."""
    table = Table(title=f"decomposition at {row.hour} (estimates)", title_justify="left")
    table.add_column("part")
    table.add_column("visits", justify="right")
    table.add_row("observed", human(row.observed if row.observed is not None else row.imputed)
                  + (" (imputed)" if row.observed is None and row.imputed is not None else ""))
    table.add_row("own seasonal expectation", human(row.own_expected))
    table.add_row("neighbours' expected extra (forecast)", human(row.neighbours))
    for u in row.upstream:
        link = f", {u.link} link" if u.link else ""
        table.add_row(f"  from {u.node} ({u.share * 100:.0f}% of the excess{link})", human(u.visits))
    table.add_row("unexplained", human(row.unexplained))
    table.add_row("kind", row.origin or "-")
    return table


def graph_table(node: str, rows: Sequence[tuple[int, str, str, float, int]], direction: str,
                limit: int = 50) -> Table:
    """Neighbourhood rows: (hops, node, via, lag-0 share, link age in hours)."""
    arrow = "upstream of" if direction == "up" else "downstream of"
    shown = f", first {limit} shown" if len(rows) > limit else ""
    table = Table(title=f"{len(rows)} node(s) {arrow} {node}{shown}", title_justify="left")
    for col in ("hops", "node", "via", "learned share", "link age (h)"):
        table.add_column(col, justify="right" if col in ("hops", "learned share", "link age (h)") else "left")
    for hops, other, via, share, age in rows[:limit]:
        table.add_row(str(hops), other, via, f"{share:.4f}", str(age))
    return table


def _count(value: float) -> str:
    return "n/a" if value != value else f"{value:.0f}"


def _pct(value: float) -> str:
    return "n/a" if value != value else f"{value:.2f}"


def score_tables(score: Score, own_only: Score | None = None) -> list[Table]:
    """Precision per direction, recall per event kind, and the headline figures.

    With ``own_only`` the headline shows the seasonal baseline alone beside the joint model.
    """
    prec = Table(title="precision by direction (labelled week)", title_justify="left")
    for col in ("direction", "alerts", "true", "precision"):
        prec.add_column(col)
    for direction, row in score.precision.items():
        prec.add_row(direction, str(row["alerts"]), str(row["true"]), _pct(row["precision"]))
    rec = Table(title="recall by event kind", title_justify="left")
    for col in ("kind", "events", "detected", "recall"):
        rec.add_column(col)
    for kind, row in score.recall.items():
        rec.add_row(kind, str(row["events"]), str(row["detected"]), _pct(row["recall"]))
    summ = Table(title="headline", title_justify="left")
    summ.add_column("figure")
    summ.add_column("this run", justify="right")
    if own_only is not None:
        summ.add_column("baseline alone", justify="right")
    for name, value in score.summary.items():
        show = _count if name == "incidents" else _pct
        cells = [name.replace("_", " "), show(value)]
        if own_only is not None:
            cells.append(show(own_only.summary.get(name, float("nan"))))
        summ.add_row(*cells)
    return [prec, rec, summ]


def history_table(node: str, rows: Sequence[NodeHour], at: str) -> Table:
    """A node's observed, expected, band and residual around one hour."""
    table = Table(title=f"{node} around {at}", title_justify="left")
    for col in ("hour (UTC)", "observed", "expected", "band", "score", "note"):
        table.add_column(col, justify="left" if col in ("hour (UTC)", "note") else "right")
    for r in rows:
        notes = [n for n, on in (("cold start", not r.warm and r.observed is not None),
                                 ("missing", r.observed is None), ("regime adopted", r.adopted)) if on]
        if r.alert:
            notes.insert(0, f"ALERT {r.alert}")
        mark = ">" if r.hour == at else " "
        score = "-" if r.score is None else f"{r.score:+.1f}"
        table.add_row(f"{mark}{r.hour}", human(r.observed), human(r.expected),
                      f"{human(r.band_low)}..{human(r.band_high)}", score, ", ".join(notes))
    return table


def console(stderr: bool = False) -> Console:
    """The terminal writer. No markup: node ids are user data, and one like ``/q=[/b]`` would
    otherwise raise a MarkupError (or ``[red]`` restyle the table)."""
    return Console(stderr=stderr, highlight=False, markup=False, soft_wrap=False, width=140)
