"""Pictures where a picture beats a table: a node's history with its band and alerts."""

from __future__ import annotations

from collections.abc import Sequence

from .records import NodeHour
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
    ax.set_title(f"{node} around {at} (UTC); shaded: expected band; vertical bars: alerts")
    ax.set_ylabel("visits per hour")
    ax.legend(loc="upper left", fontsize=8)
    ax.xaxis_date()
    fig.autofmt_xdate()
    fig.tight_layout()
    fig.savefig(path)
    plt.close(fig)
