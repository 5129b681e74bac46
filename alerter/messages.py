"""Pure message rendering: incident updates (plus their alerts) to text people read.

No I/O here. Every piece of user data (node ids, incident ids, rule names) passes through
``escape`` before it reaches a message, so a crafted id cannot open markup, call a
mention, start a link or break a line; long values are cut with an ellipsis. Numbers are
rounded for people (``1.2k``, ``+240%``). Each message ends with a line saying that the
upstream attribution is an estimate, not proof of cause.

Two flavours: ``plain`` (terminals, files, endpoints that show text as is) and
``markdown`` (CommonMark-style light markup: bold title, escaped punctuation).
"""

from __future__ import annotations

import math
import re
from collections.abc import Iterable, Sequence
from dataclasses import dataclass
from typing import Literal

from .incidents import IncidentUpdate
from .records import Alert, SpillWarning

__all__ = ["RenderOptions", "Rendered", "escape", "truncate", "human_number", "percent_above", "visits",
           "state_word", "render_update", "render_spill_note", "render_alert", "render_fold_summary",
           "render_digest_text", "render_demo_messages", "ESTIMATE_LINE"]

ESTIMATE_LINE = ("Note: the upstream sources and shares are estimates from learned link shares, "
                 "not proof of cause.")
ELLIPSIS = "\u2026"
WORD_JOINER = "\u2060"  # invisible, breaks '@name' and 'scheme://' so nothing auto-links or notifies
_CONTROL = re.compile(r"[\x00-\x1f\x7f-\x9f\u2028\u2029\u200b-\u200f\u202a-\u202e\u2066-\u2069\ufeff]")
_MENTION = re.compile(r"([@#!])(?=[\w!])", re.UNICODE)
_LINK = re.compile(r"(://|www\.)", re.IGNORECASE)
_MD_PUNCT = re.compile(r"([\\`*_\[\]()#|~])")
_HTML = {"&": "&amp;", "<": "&lt;", ">": "&gt;"}


@dataclass(frozen=True)
class RenderOptions:
    """How a message looks: flavour, cut lengths and how many rows of each list."""

    markup: Literal["plain", "markdown"] = "plain"
    max_id_chars: int = 80
    max_message_chars: int = 3500
    top_upstream: int = 3
    max_members: int = 8


@dataclass(frozen=True)
class Rendered:
    """One message: its title line, full text, and the thread it belongs to (incident id)."""

    title: str
    text: str
    thread: str
    revision: int
    state: str


def truncate(text: str, limit: int) -> str:
    """At most ``limit`` characters; a cut value ends with an ellipsis (counted in the limit)."""
    if limit < 1:
        return ""
    return text if len(text) <= limit else text[: limit - 1] + ELLIPSIS


def _visible_control(ch: str) -> str:
    if ch in "\n\r":
        return "\u21b5"  # a visible return sign: the id stays on one line
    return "\ufffd" if ch not in "\t" else " "


def escape(value: object, limit: int = 80, markup: str = "plain") -> str:
    """User data as literal text: controls shown, mentions and links broken, markup escaped.

    Cut first (so the limit counts what the user sent), then neutralised.

    >>> escape("@here <!channel> *x*\\nnext", 80, "markdown").replace(WORD_JOINER, "^")
    '@^here &lt;!^channel&gt; \\\\*x\\\\*\u21b5next'
    >>> escape("a" * 10, 5)
    'aaaa\u2026'
    """
    text = truncate(str(value), limit)
    text = _CONTROL.sub(lambda m: _visible_control(m.group()), text)
    text = _LINK.sub(lambda m: m.group()[:-1] + WORD_JOINER + m.group()[-1], text)
    if markup == "markdown":
        text = "".join(_HTML.get(ch, ch) for ch in text)
        text = _MD_PUNCT.sub(r"\\\1", text)
    else:
        text = text.replace("<", "\u2039").replace(">", "\u203a")  # single angle quotes: no <...> forms
    return _MENTION.sub(lambda m: m.group(1) + WORD_JOINER, text)


def human_number(value: float) -> str:
    """A count rounded for people: 950, 1.2k, 34k, 1.5M.

    >>> [human_number(v) for v in (0, 12.4, 950, 1234, 34567, 1.5e6, -2400)]
    ['0', '12', '950', '1.2k', '35k', '1.5M', '-2.4k']
    """
    if not math.isfinite(value):
        return "n/a"
    sign = "-" if value < 0 else ""
    v = abs(value)
    for unit, size in (("G", 1e9), ("M", 1e6), ("k", 1e3)):
        if v >= size * 0.9995:
            scaled = v / size
            return f"{sign}{scaled:.1f}{unit}".replace(".0" + unit, unit) if scaled < 10 else \
                f"{sign}{scaled:.0f}{unit}"
    return f"{sign}{v:.0f}"


def visits(value: float) -> str:
    """A number of visits for people, singular when it rounds to one.

    >>> [visits(v) for v in (0, 1.2, -1, 2, 1234)]
    ['0 visits', '1 visit', '-1 visit', '2 visits', '1.2k visits']
    """
    shown = human_number(value)
    return f"{shown} visit" if shown.lstrip("-") == "1" else f"{shown} visits"


def percent_above(observed: float, expected: float) -> str:
    """Observed against expected as a signed percentage: +240%, -65%, or 'new' from zero.

    >>> [percent_above(o, e) for o, e in ((340, 100), (35, 100), (5, 0), (100, 100))]
    ['+240%', '-65%', 'from ~0', '+0%']
    """
    if expected <= 0:
        return "from ~0"
    pct = (observed - expected) / expected * 100.0
    return f"{pct:+.0f}%" if abs(pct) < 10000 else f"{pct / 100:+.0f}x"


def _hour(text: str) -> str:
    """'2026-11-20T10:00:00Z' -> '2026-11-20 10:00 UTC' (hours are stored in UTC)."""
    return text[:16].replace("T", " ") + " UTC" if len(text) >= 16 else text


def _bold(text: str, opts: RenderOptions) -> str:
    return f"**{text}**" if opts.markup == "markdown" else text


def _esc(value: object, opts: RenderOptions) -> str:
    return escape(value, opts.max_id_chars, opts.markup)


def _alert_lines(alert: Alert, opts: RenderOptions) -> list[str]:
    """The lines of one member: numbers, band, kind, then its top upstream sources."""
    origin = alert.origin or "unattributed"
    head = (f"- {_esc(alert.node, opts)}: observed {human_number(alert.observed)} vs expected "
            f"{human_number(alert.expected)} (band {human_number(alert.band_low)} to "
            f"{human_number(alert.band_high)}), {percent_above(alert.observed, alert.expected)}, {origin}")
    lines = [head]
    for up in alert.upstream[: opts.top_upstream]:
        link = f", {up.link} link" if up.link else ""
        lines.append(f"    via {_esc(up.node, opts)}: ~{visits(up.visits)} "
                     f"({up.share * 100:.0f}% of the excess{link})")
    if alert.unexplained is not None and alert.upstream:
        lines.append(f"    unexplained: ~{visits(abs(alert.unexplained))}")
    return lines


def state_word(revision: int, state: str) -> str:
    """The header's state word: "new" only on an incident's first message; every later
    revision shows its real state, so a re-activated incident (state "open" again) reads
    "open" and is never taken for a second incident.

    >>> [state_word(r, s) for r, s in ((1, "open"), (2, "growing"), (4, "open"), (5, "closed"))]
    ['new', 'growing', 'open', 'closed']
    """
    return "new" if revision <= 1 and state == "open" else state


def _title(update: IncidentUpdate, opts: RenderOptions) -> str:
    tag = f"{update.direction} {state_word(update.revision, update.state)}".upper()
    return (f"{_bold('[' + tag + ']', opts)} incident {_esc(update.incident, opts)} "
            f"rooted at {_esc(update.root, opts)}")


def _context_line(update: IncidentUpdate) -> str:
    nodes = len(update.members)
    sign = "+" if update.total_excess >= 0 else ""
    base = (f"hour {_hour(update.hour)}; since {_hour(update.start)}; {nodes} node{'s' if nodes != 1 else ''}; "
            f"excess {sign}{visits(update.total_excess)}")
    if update.revision > 1:
        base += f"; update {update.revision} to the first message of this incident"
    return base


def _members_block(update: IncidentUpdate, alerts: Sequence[Alert], opts: RenderOptions) -> list[str]:
    by_node = {a.node: a for a in alerts if a.node in set(update.members) and a.kind == update.direction}
    order = sorted(by_node.values(), key=lambda a: (a.node != update.root, -abs(a.excess), a.node))
    lines: list[str] = []
    for alert in order[: opts.max_members]:
        lines.extend(_alert_lines(alert, opts))
    quiet = [m for m in update.members if m not in by_node]
    hidden = len(order) - min(len(order), opts.max_members)
    if hidden:
        lines.append(f"- and {hidden} more alerting node{'s' if hidden != 1 else ''}")
    if quiet:
        lines.append(f"- no new alert this hour: {_listed(quiet, 5, opts)}")
    return lines


def _listed(nodes: Sequence[str], limit: int, opts: RenderOptions) -> str:
    """Up to ``limit`` escaped node ids, then how many more were left out."""
    shown = ", ".join(_esc(m, opts) for m in nodes[:limit])
    return shown + (f" and {len(nodes) - limit} more" if len(nodes) > limit else "")


def _spill_lines(spills: Iterable[SpillWarning], incident: str, opts: RenderOptions) -> list[str]:
    return [f"- spill-over: {_esc(w.node, opts)} forecast {human_number(w.forecast)}/h for {_hour(w.hour)} "
            f"over capacity {human_number(w.capacity)}/h (via {_esc(w.via, opts)})"
            for w in spills if w.incident == incident]


def render_update(update: IncidentUpdate, alerts: Sequence[Alert] = (), spills: Sequence[SpillWarning] = (),
                  opts: RenderOptions = RenderOptions()) -> Rendered:
    """One incident update (and the alerts of its members that hour) as a message."""
    title = _title(update, opts)
    lines = [title, _context_line(update)]
    if update.new_members and update.revision > 1:
        lines.append("new nodes: " + _listed(update.new_members, opts.max_members, opts))
    if update.state == "closed":
        lines.append("closed: no node beyond its band for the quiet period; last members: "
                     + _listed(update.members, opts.max_members, opts))
    else:
        lines.extend(_members_block(update, alerts, opts))
    lines.extend(_spill_lines(spills, update.incident, opts))
    lines.append(ESTIMATE_LINE)
    text = _fit("\n".join(lines), opts.max_message_chars)
    return Rendered(title=title, text=text, thread=update.incident, revision=update.revision, state=update.state)


def _fit(text: str, limit: int) -> str:
    """Cut a long message but keep the estimate line, which must always be read."""
    if len(text) <= limit:
        return text
    keep = limit - len(ESTIMATE_LINE) - 1
    return truncate(text[: max(keep, 1) + 1], max(keep, 1)) + "\n" + ESTIMATE_LINE


def render_spill_note(incident: str, hour: str, spills: Sequence[SpillWarning],
                      opts: RenderOptions = RenderOptions()) -> tuple[str, str]:
    """A short follow-up for spill-over warnings of an hour in which the incident had no update."""
    title = (f"{_bold('[SPILL-OVER]', opts)} incident {_esc(incident, opts)}: {len(spills)} downstream "
             f"node{'s' if len(spills) != 1 else ''} forecast over capacity after {_hour(hour)}")
    text = "\n".join([title, *_spill_lines(spills, incident, opts), ESTIMATE_LINE])
    return title, _fit(text, opts.max_message_chars)


def render_alert(alert: Alert, opts: RenderOptions = RenderOptions()) -> tuple[str, str]:
    """One alert on its own (for file and stream sinks that take every outbox entry)."""
    title = (f"{_bold('[' + alert.kind.upper() + ']', opts)} {_esc(alert.node, opts)} at {_hour(alert.hour)}, "
             f"{alert.streak} hour(s) in a row")
    text = "\n".join([title, *_alert_lines(alert, opts), ESTIMATE_LINE])
    return title, _fit(text, opts.max_message_chars)


def render_fold_summary(count: int, first_hour: str, last_hour: str, states: dict[str, int],
                        top: Sequence[tuple[str, float]], per_minute: int,
                        opts: RenderOptions = RenderOptions()) -> str:
    """The one message that stands for updates held back by a sink's rate limit."""
    parts = ", ".join(f"{n} {s}" for s, n in sorted(states.items()))
    lines = [f"{_bold('[HELD BACK]', opts)} {count} more incident update{'s' if count != 1 else ''} "
             f"over the limit of {per_minute} message(s) per minute, hours {_hour(first_hour)} to "
             f"{_hour(last_hour)} ({parts})"]
    for node, excess in top:
        lines.append(f"- {_esc(node, opts)}: excess {visits(excess)}")
    lines.append("All held-back updates are in the outbox stream and the delivery log.")
    lines.append(ESTIMATE_LINE)
    return _fit("\n".join(lines), opts.max_message_chars)


def render_digest_text(since: str, until: str, incidents: int, states: dict[str, int],
                       top: Sequence[tuple[str, float]], suppressed: dict[str, int],
                       opts: RenderOptions = RenderOptions()) -> str:
    """The daily digest: incidents, top surging nodes, what was suppressed (as far as known)."""
    lines = [f"{_bold('[DAILY DIGEST]', opts)} {_hour(since)} to {_hour(until)}: {incidents} incident(s)"
             + (" (" + ", ".join(f"{n} {s}" for s, n in sorted(states.items())) + ")" if states else "")]
    if top:
        lines.append("top surging nodes:")
        lines.extend(f"- {_esc(node, opts)}: excess {visits(excess)}" for node, excess in top)
    for why, n in sorted(suppressed.items()):
        lines.append(f"suppressed by {why}: {n}")
    lines.append(ESTIMATE_LINE)
    return _fit("\n".join(lines), opts.max_message_chars)


def render_demo_messages(alerts: Sequence[Alert], incidents: Sequence[IncidentUpdate],
                         opts: RenderOptions = RenderOptions()) -> list[str]:
    """The chat messages of a run: one per incident update, in hour order, joined to its alerts."""
    by_hour: dict[str, list[Alert]] = {}
    for a in alerts:
        by_hour.setdefault(a.hour, []).append(a)
    ordered = sorted(incidents, key=lambda u: (u.hour, u.incident, u.revision))
    return [render_update(u, by_hour.get(u.hour, ()), (), opts).text for u in ordered]
