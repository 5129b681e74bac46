"""Readable terminal output: alert tables, scores and a node's history (rich)."""

from __future__ import annotations

from collections.abc import Sequence

from rich.console import Console
from rich.table import Table

from .records import Alert, NodeHour
from .scoring import Score

__all__ = ["alerts_table", "score_tables", "history_table", "human"]


def human(value: float | None) -> str:
    """Round a count for people: 950, 1.2k, 3.4M.

    >>> human(1234.0), human(950.0), human(3_400_000.0), human(None)
    ('1.2k', '950', '3.4M', '-')
    """
    if value is None:
        return "-"
    size = abs(value)
    if size >= 1e6:
        return f"{value / 1e6:.1f}M"
    if size >= 1e4:
        return f"{value / 1e3:.0f}k"
    if size >= 1e3:
        return f"{value / 1e3:.1f}k"
    return f"{value:.0f}"


def alerts_table(alerts: Sequence[Alert], limit: int = 40) -> Table:
    """The first ``limit`` alerts, one row each."""
    title = f"{len(alerts)} alert(s)" + (f", first {limit} shown" if len(alerts) > limit else "")
    table = Table(title=title, title_justify="left")
    for name, justify in (("hour (UTC)", "left"), ("node", "left"), ("kind", "left"),
                          ("observed", "right"), ("expected", "right"), ("band", "right"),
                          ("change", "right"), ("score", "right"), ("rule", "left")):
        table.add_column(name, justify=justify)  # type: ignore[arg-type]
    for a in alerts[:limit]:
        change = f"{(a.observed - a.expected) / max(a.expected, 1.0) * 100:+.0f}%"
        table.add_row(a.hour, a.node, a.kind, human(a.observed), human(a.expected),
                      f"{human(a.band_low)}..{human(a.band_high)}", change, f"{a.score:+.1f}", a.rule)
    return table


def _pct(value: float) -> str:
    return "n/a" if value != value else f"{value:.2f}"


def score_tables(score: Score) -> list[Table]:
    """Precision per direction, recall per event kind, and the headline figures."""
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
    summ.add_column("value")
    for name, value in score.summary.items():
        summ.add_row(name.replace("_", " "), _pct(value))
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
    return Console(stderr=stderr, highlight=False, soft_wrap=False, width=140)
