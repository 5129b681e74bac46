"""Pictures where a picture beats a table: a node's history with its band and alerts, and
where over a week a proposed config drops or adds alerts."""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from datetime import datetime

from .records import Alert, NodeHour
from .timeaxis import parse_hour


def plot_history(node: str, rows: Sequence[NodeHour], at: str, path: str) -> None:
    """Observed counts against the expected value and band; alert hours marked."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt
    from matplotlib.dates import date2num

    hours = [float(date2num(parse_hour(r.hour))) for r in rows]
    fig, ax = plt.subplots(figsize=(10, 4), dpi=100)
    ax.fill_between(hours, [r.band_low for r in rows], [r.band_high for r in rows],
                    color="0.85", label="band")
    ax.plot(hours, [r.expected for r in rows], color="0.35", lw=1.5, label="expected")
    obs = [(h, r.observed) for h, r in zip(hours, rows, strict=True) if r.observed is not None]
    if obs:
        ax.plot([h for h, _ in obs], [v for _, v in obs], "o-", ms=3, lw=1, color="tab:blue", label="observed")
    for h, r in zip(hours, rows, strict=True):
        if r.alert:
            ax.axvline(h, color="tab:red" if r.alert == "surge" else "tab:purple", alpha=0.4, lw=2)
    ax.axvline(float(date2num(parse_hour(at))), color="k", ls=":", lw=1)
    # a node id is user data: "$" in it must not start matplotlib's math text
    ax.set_title(f"{node} around {at} (UTC); shaded: expected band; vertical bars: alerts", parse_math=False)
    ax.set_ylabel("visits per hour")
    ax.legend(loc="upper left", fontsize=8)
    ax.xaxis_date()
    fig.autofmt_xdate()
    fig.tight_layout()
    fig.savefig(path)
    plt.close(fig)


def plot_comparison(kept: Sequence[Alert], dropped: Sequence[Alert], added: Sequence[Alert],
                    truth: Mapping[str, Sequence[bool | None]], events: Sequence[tuple[datetime, datetime]],
                    title: str, path: str) -> None:
    """One row per config along time, a mark per alert: kept alerts on both rows, dropped ones
    on the current row only, added ones on the proposed row only; with labels, marks of true
    events filled and false alarms hollow, and the labelled events shaded."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt
    from matplotlib.dates import date2num

    def x(alerts: Sequence[Alert]) -> list[float]:
        return [float(date2num(parse_hour(a.hour))) for a in alerts]

    fig, ax = plt.subplots(figsize=(12, 3.2), dpi=100)
    for start, end in events:
        ax.axvspan(float(date2num(start)), float(date2num(end)), color="0.9", lw=0)
    for row in (0, 1):
        ax.plot(x(kept), [row] * len(kept), "|", ms=14, color="0.45", label="in both" if row else None)
    for alerts, row, colour, name in ((dropped, 1, "tab:red", "dropped"), (added, 0, "tab:green", "added")):
        verdicts = truth.get(name, [None] * len(alerts))
        for filled, label in ((True, f"{name}: labelled event"), (False, f"{name}: false alarm"),
                              (None, name)):
            pick = [a for a, t in zip(alerts, verdicts, strict=True) if t is filled]
            if pick:
                ax.plot(x(pick), [row] * len(pick), "o", ms=7, color=colour, label=label,
                        markerfacecolor=colour if filled is not False else "none")
    ax.set_yticks([0, 1], ["proposed", "current"])
    ax.set_ylim(-0.7, 1.7)
    ax.set_title(title + ("; shaded: labelled events" if events else ""), fontsize=10, parse_math=False)
    ax.legend(loc="upper left", bbox_to_anchor=(1.01, 1.0), fontsize=8, frameon=False)
    ax.xaxis_date()
    fig.autofmt_xdate()
    fig.tight_layout()
    fig.savefig(path)
    plt.close(fig)
