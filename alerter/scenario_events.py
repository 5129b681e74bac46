"""The labelled events of the demo scenario: where and when they happen, and their labels.

Week 3 of the invented Fernhollow Courier recording carries fifteen events of seven kinds.
Planning is a pure function of a random generator and the event-free traffic: it returns
extra external visits, bot visits, down hours, missing hours and link changes, which the
generator then pushes through the link graph. Labelling compares the resulting expected
visits with the event-free ones, so the labels describe what the data really contains.

Events sit on distinct pages: each event claims its root and the root's children (its
"footprint") and later events must avoid every claimed page. Timed events also get
separate slots in week 3, so their windows never overlap; the two level shifts run on
quiet pages in parallel with the rest.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from datetime import datetime, timedelta

import numpy as np
import scipy.sparse as sp
from scipy.sparse.csgraph import breadth_first_order

__all__ = ["EdgeChange", "PlanContext", "EventSpec", "Plan", "plan_events", "label_events", "schedule"]

MIN_VOLUME = 40.0  # mean expected visits/hour a root needs during its event ...
MIN_FLOOR = 20.0  # ... and the least it may have in any hour of the event
SURGE_GAIN = 1.0  # a propagated surge node gains at least its normal visits (it at least doubles)
DROP_SHARE = 0.5  # a propagated drop node loses at least this share of its normal visits
MIN_CHANGE = 20.0  # ... and at least this many visits in the same hour
CLAIM_SHARE = 0.05  # a child getting this share of its visits from a root is claimed with it
LONG_WINDOW = 12  # label window after a link is added or removed
OUTAGE_ZERO, OUTAGE_MISSING = 3, 3
SHIFT_RAMP = 48
SHORT_KINDS = ("referral_surge",) * 3 + ("section_cascade",) * 2 + ("bot_flood",) * 2 + ("outage",) * 2
LONG_KINDS = ("new_link",) * 2 + ("link_removed",) * 2
DIRECTION = {"referral_surge": "surge", "new_link": "surge", "section_cascade": "surge", "bot_flood": "surge",
             "link_removed": "drop", "outage": "drop", "level_shift": "surge"}


@dataclass(frozen=True)
class EdgeChange:
    """A link appearing (``add``, with its click share) or disappearing at an hour index."""

    hour: int
    op: str
    src: int
    dst: int
    share: float


@dataclass(frozen=True)
class PlanContext:
    """What planning may look at: pages, week-3 links and event-free traffic."""

    pages: tuple[str, ...]
    shares: sp.csr_matrix  # links in force when week 3 starts
    normal: np.ndarray  # expected human visits without events (pages x hours)
    external: np.ndarray  # expected external visits without events
    eligible: np.ndarray  # pages that exist from hour 0 and are not moved by background churn
    week3: int
    first_article: int


@dataclass(frozen=True)
class EventSpec:
    """One planned event, before its propagated nodes are measured."""

    kind: str
    root: int
    start: int
    end: int
    factor: float = 1.0
    target: int = -1  # the article of a new or removed link
    alert_expected: bool = True
    root_changes_traffic: bool = True
    spread: bool = True  # look for propagated nodes downstream


@dataclass
class Plan:
    """The planned events and the changes to the traffic they cause (pages x hours arrays)."""

    extra: np.ndarray
    bots: np.ndarray
    avail: np.ndarray
    missing: np.ndarray
    free: np.ndarray  # pages no event has claimed yet
    changes: list[EdgeChange] = field(default_factory=list)
    specs: list[EventSpec] = field(default_factory=list)


def schedule(rng: np.random.Generator, week3: int) -> list[tuple[str, int]]:
    """Start hours in week 3: four days with a 12-hour link event (07-08 local) and an evening
    slot, three days with a morning and an afternoon slot; level shifts early in the week.

    Slots never overlap: short events last at most 8 hours, so a morning slot (08-09) ends
    before the afternoon one (17-18) and an evening slot (20-21) before the next morning.
    Hour index ``week3 + 24 * day + h`` is local hour ``h`` (no DST change in the recording).
    """
    long_days = np.sort(rng.choice(7, size=4, replace=False))
    out = [(str(kind), week3 + 24 * int(day) + 7 + int(rng.integers(2)))
           for kind, day in zip(rng.permutation(list(LONG_KINDS)), long_days, strict=True)]
    short = [week3 + 24 * int(d) + 20 + int(rng.integers(2)) for d in long_days if d < 6]
    for day in sorted(set(range(7)) - {int(d) for d in long_days}):
        short += [week3 + 24 * day + 8 + int(rng.integers(2)), week3 + 24 * day + 17 + int(rng.integers(2))]
    picks = np.sort(rng.choice(len(short), size=len(SHORT_KINDS), replace=False))
    out += [(str(k), short[i]) for k, i in zip(rng.permutation(list(SHORT_KINDS)), picks, strict=True)]
    out += [("level_shift", week3 + 4 + int(rng.integers(30))),
            ("level_shift", week3 + 40 + int(rng.integers(40)))]
    return out


def _children(shares: sp.csr_matrix, i: int) -> np.ndarray:
    return shares.indices[shares.indptr[i]:shares.indptr[i + 1]]


def _reliance(ctx: PlanContext, start: int, end: int) -> sp.csr_matrix:
    """Share of each child's visits (column) that comes from each parent (row) over a window."""
    mean = np.maximum(ctx.normal[:, start:end].mean(axis=1), 1e-9)
    return sp.csr_matrix(sp.diags(mean) @ ctx.shares @ sp.diags(1.0 / mean))


def _fits(ctx: PlanContext, plan: Plan, start: int, end: int) -> np.ndarray:
    """Pages that may root a new event: eligible, unclaimed, no reliant child claimed."""
    strong = (_reliance(ctx, start, end) >= CLAIM_SHARE).astype(float)
    claimed_child = (strong @ (~plan.free).astype(float)) > 0
    return ctx.eligible & plan.free & ~claimed_child


def _claim(ctx: PlanContext, plan: Plan, i: int, start: int, end: int) -> None:
    """Reserve page ``i`` and the children that get a noticeable share of their visits from it."""
    row = _reliance(ctx, start, end)[i]
    plan.free[i] = False
    plan.free[row.indices[row.data >= CLAIM_SHARE]] = False


def _pick(rng: np.random.Generator, mask: np.ndarray, kind: str) -> int:
    cands = np.flatnonzero(mask)
    if cands.size == 0:
        raise ValueError(f"no page fits a {kind} event; use more pages (n_pages)")
    return int(cands[rng.integers(cands.size)])


def _kinds(ctx: PlanContext) -> tuple[np.ndarray, np.ndarray]:
    """Masks of section pages and article pages."""
    idx = np.arange(len(ctx.pages))
    return (idx >= 1) & (idx < ctx.first_article), idx >= ctx.first_article


def _busy(ctx: PlanContext, start: int, end: int) -> np.ndarray:
    """Pages whose event-free visits over the window are decent: mean and floor both high enough."""
    window = ctx.normal[:, start:end]
    return (window.mean(axis=1) >= MIN_VOLUME) & (window.min(axis=1) >= MIN_FLOOR)


def _pulse(hours: int, plateau: bool) -> np.ndarray:
    """Shape of a surge over its hours (peak 1): ramp up, then a plateau or a slow decay."""
    if plateau:
        return np.concatenate([[0.7], np.ones(hours - 1)])
    return np.concatenate([[0.6], np.linspace(1.0, 0.4, hours - 1)])


def _referral(rng: np.random.Generator, ctx: PlanContext, plan: Plan, start: int) -> None:
    """Outside referral: extra external (human) visits to an article for 4-8 hours."""
    hours = min(int(rng.integers(4, 9)), ctx.normal.shape[1] - start)
    end, factor = start + hours, float(rng.uniform(4.0, 16.0))
    _, article = _kinds(ctx)
    busy = _busy(ctx, start, end)
    fits = _fits(ctx, plan, start, end) & busy
    root = _pick(rng, fits & article & (np.diff(ctx.shares.indptr) >= 1), "referral_surge")
    plan.extra[root, start:end] += (factor - 1.0) * ctx.normal[root, start:end] * _pulse(hours, False)
    _claim(ctx, plan, root, start, end)
    plan.specs.append(EventSpec("referral_surge", root, start, end, factor))


def _cascade(rng: np.random.Generator, ctx: PlanContext, plan: Plan, start: int) -> None:
    """A section page gets a burst of outside visitors who click on into its articles."""
    hours = min(int(rng.integers(3, 7)), ctx.normal.shape[1] - start)
    end, factor = start + hours, float(rng.uniform(4.0, 8.0))
    section, _ = _kinds(ctx)
    root = _pick(rng, _fits(ctx, plan, start, end) & section, "section_cascade")
    plan.extra[root, start:end] += (factor - 1.0) * ctx.normal[root, start:end] * _pulse(hours, True)
    _claim(ctx, plan, root, start, end)
    plan.specs.append(EventSpec("section_cascade", root, start, end, factor))


def _bots(rng: np.random.Generator, ctx: PlanContext, plan: Plan, start: int) -> None:
    """Automated visits to one article with at least two links out; bots click nothing."""
    hours = min(int(rng.integers(2, 5)), ctx.normal.shape[1] - start)
    end, factor = start + hours, float(rng.uniform(10.0, 30.0))
    _, article = _kinds(ctx)
    busy = _busy(ctx, start, end)
    fits = _fits(ctx, plan, start, end) & busy
    root = _pick(rng, fits & article & (np.diff(ctx.shares.indptr) >= 2), "bot_flood")
    plan.bots[root, start:end] += (factor - 1.0) * ctx.normal[root, start:end]
    _claim(ctx, plan, root, start, end)
    plan.specs.append(EventSpec("bot_flood", root, start, end, factor, spread=False))


def _dependents(ctx: PlanContext, start: int, end: int) -> np.ndarray:
    """Per page, how many children get at least half of their visits from it in a window."""
    return np.asarray((_reliance(ctx, start, end) >= DROP_SHARE).sum(axis=1)).ravel()


def _outage(rng: np.random.Generator, ctx: PlanContext, plan: Plan, start: int) -> None:
    """A page is down: 0 visits for 3 hours, then no count at all for 3 hours.

    The first outage hits a section page, the second an article, preferring pages that
    other pages depend on for at least half of their visits.
    """
    end = start + OUTAGE_ZERO + OUTAGE_MISSING
    section, article = _kinds(ctx)
    first = not any(s.kind == "outage" for s in plan.specs)
    mask = _fits(ctx, plan, start, end) & (section if first else article) & _busy(ctx, start, end)
    preferred = mask & (_dependents(ctx, start, end) >= 1)
    root = _pick(rng, preferred if preferred.any() else mask, "outage")
    plan.avail[root, start:end] = 0.0
    plan.missing[root, start + OUTAGE_ZERO:end] = True
    _claim(ctx, plan, root, start, end)
    plan.specs.append(EventSpec("outage", root, start, end))


def _new_link(rng: np.random.Generator, ctx: PlanContext, plan: Plan, start: int) -> None:
    """The front page starts linking an article, with a share that multiplies its visits 4-7x."""
    end, jump = start + LONG_WINDOW, float(rng.uniform(4.0, 7.0))
    _, article = _kinds(ctx)
    ratio = ctx.normal[:, start:end] / np.maximum(ctx.normal[0, start:end], 1e-9)
    need = (jump - 1.0) * ratio.max(axis=1)
    front_out = float(ctx.shares[0].sum()) + sum(c.share for c in plan.changes if c.src == 0)
    linked = np.zeros(len(ctx.pages), dtype=bool)
    linked[_children(ctx.shares, 0)] = True
    fits = _fits(ctx, plan, start, end) & _busy(ctx, start, end)
    mask = fits & article & ~linked & (need <= min(0.05, 0.58 - front_out))
    target = _pick(rng, mask, "new_link")
    plan.changes.append(EdgeChange(start, "add", 0, target, float(need[target])))
    _claim(ctx, plan, target, start, end)
    plan.specs.append(EventSpec("new_link", 0, start, end, jump, target=target, root_changes_traffic=False))


def _link_removed(rng: np.random.Generator, ctx: PlanContext, plan: Plan, start: int) -> None:
    """A section drops its link to an article that got most of its visits from it."""
    end = start + LONG_WINDOW
    section, _ = _kinds(ctx)
    hubs = np.flatnonzero(_fits(ctx, plan, start, end) & section)
    busy = _busy(ctx, start, end)
    pairs = []
    for h in hubs.tolist():
        kids = _children(ctx.shares, h)
        share = ctx.shares[h, kids].toarray().ravel()
        left = 1.0 - share[:, None] * ctx.normal[h, start:end] / np.maximum(ctx.normal[kids, start:end], 1e-9)
        good = (left.max(axis=1) <= 0.35) & busy[kids] & ctx.eligible[kids]
        pairs += [(h, int(k)) for k in kids[good]]
    if not pairs:
        raise ValueError("no section link fits a link_removed event; use more pages (n_pages)")
    hub, target = pairs[int(rng.integers(len(pairs)))]
    plan.changes.append(EdgeChange(start, "remove", hub, target, 0.0))
    plan.free[hub] = False
    _claim(ctx, plan, target, start, end)
    plan.specs.append(EventSpec("link_removed", hub, start, end, target=target, root_changes_traffic=False))


def _level_shift(rng: np.random.Generator, ctx: PlanContext, plan: Plan, start: int) -> None:
    """An article's outside visits climb over 48 hours to about double and stay: no alert wanted."""
    hours = ctx.normal.shape[1]
    factor = float(rng.uniform(1.8, 2.2))
    _, article = _kinds(ctx)
    volume = ctx.normal[:, start:start + 24].mean(axis=1)
    own = ctx.external[:, start:start + 24].mean(axis=1) / np.maximum(volume, 1e-9)
    fits = _fits(ctx, plan, start, hours)
    root = _pick(rng, fits & article & (volume >= MIN_VOLUME) & (own >= 0.7), "level_shift")
    ramp = np.minimum(np.arange(1, hours - start + 1) / SHIFT_RAMP, 1.0)
    plan.extra[root, start:] += (factor - 1.0) * ramp * ctx.external[root, start:]
    _claim(ctx, plan, root, start, hours)
    plan.specs.append(EventSpec("level_shift", root, start, hours, factor, alert_expected=False))


PLANNERS = {"section_cascade": _cascade, "link_removed": _link_removed, "outage": _outage,
            "new_link": _new_link, "bot_flood": _bots, "referral_surge": _referral, "level_shift": _level_shift}
ORDER = ("section_cascade", "link_removed", "outage", "new_link", "bot_flood", "referral_surge", "level_shift")


def plan_events(rng: np.random.Generator, ctx: PlanContext) -> Plan:
    """Choose slots, pages and magnitudes of all week-3 events.

    Kinds that claim a section page go first (they claim many children), then the rest.
    """
    shape = ctx.normal.shape
    plan = Plan(np.zeros(shape), np.zeros(shape), np.ones(shape), np.zeros(shape, dtype=bool),
                np.ones(shape[0], dtype=bool))
    slots = schedule(rng, ctx.week3)
    for kind in ORDER:
        for start in sorted(s for k, s in slots if k == kind):
            PLANNERS[kind](rng, ctx, plan, start)
    return plan


NOTES = {
    "referral_surge": "A link in a regional newsletter sent extra readers to {root} for {hours} hours, "
                      "peaking near {factor:.0f}x its usual visits.",
    "new_link": "The front page began linking {target}, whose visits rose about {factor:.0f}-fold; "
                "the link stayed.",
    "section_cascade": "A widely shared post sent a burst of readers to {root} ({factor:.0f}x for {hours} hours), "
                       "spilling onto {spread} of its articles.",
    "bot_flood": "Automated clients hit {root} at about {factor:.0f}x its usual rate for {hours} hours "
                 "and followed no links.",
    "link_removed": "{root} dropped its link to {target}, which fell to about {level:.0%} of its usual visits.",
    "outage": "{root} served nothing for 3 hours and then sent no counts for 3 more{lean}.",
    "level_shift": "Outside interest in {root} grew over two days to about {factor:.1f}x and stayed; "
                   "the baseline should adopt it rather than alert.",
}


def _downstream(ctx: PlanContext, origin: int) -> np.ndarray:
    """Pages reachable from ``origin`` along week-3 links, without ``origin`` itself."""
    order = breadth_first_order(ctx.shares, origin, directed=True, return_predecessors=False)
    return np.sort(order[order != origin])


def _hits(spec: EventSpec, ctx: PlanContext, human: np.ndarray) -> np.ndarray:
    """Per page, whether some hour of the window moves it by the propagation thresholds."""
    base, now = ctx.normal[:, spec.start:spec.end], human[:, spec.start:spec.end]
    if DIRECTION[spec.kind] == "surge":
        gain = now - base
        return ((gain >= SURGE_GAIN * base) & (gain >= MIN_CHANGE)).any(axis=1)
    loss = base - now
    return ((loss >= DROP_SHARE * base) & (loss >= MIN_CHANGE)).any(axis=1)


def _propagated(spec: EventSpec, ctx: PlanContext, human: np.ndarray) -> list[int]:
    """The target of a link event, plus downstream pages that moved by the thresholds."""
    if not spec.spread:
        return []
    origin = spec.target if spec.target >= 0 else spec.root
    below = _downstream(ctx, origin)
    found = {int(i) for i in below[_hits(spec, ctx, human)[below]]}
    return sorted(found | ({spec.target} if spec.target >= 0 else set()))


def _level(spec: EventSpec, ctx: PlanContext, human: np.ndarray, node: int) -> np.ndarray:
    """Expected visits of ``node`` over the window as a multiple of its event-free visits."""
    window = slice(spec.start, spec.end)
    return human[node, window] / np.maximum(ctx.normal[node, window], 1e-9)


def _check(spec: EventSpec, ctx: PlanContext, human: np.ndarray) -> None:
    """Guard the promises of the labels: link events move their article as stated."""
    if spec.kind == "new_link" and _level(spec, ctx, human, spec.target).min() < 3.0:
        raise ValueError(f"new_link at hour {spec.start} lifts its article less than 3x")
    if spec.kind == "link_removed" and _level(spec, ctx, human, spec.target).max() > 0.4:
        raise ValueError(f"link_removed at hour {spec.start} leaves its article above 40 %")


def _label(spec: EventSpec, ctx: PlanContext, human: np.ndarray, stamps: list[str], number: int) -> dict:
    """One labels-file event."""
    _check(spec, ctx, human)
    pages = ctx.pages
    spread = _propagated(spec, ctx, human)
    nodes = {pages[spec.root]: "root"} | {pages[i]: "propagated" for i in spread}
    level = float(_level(spec, ctx, human, spec.target).mean()) if spec.target >= 0 else 1.0
    note = NOTES[spec.kind].format(root=pages[spec.root], target=pages[spec.target] if spec.target >= 0 else "",
                                   hours=spec.end - spec.start, factor=spec.factor, level=level,
                                   spread=len(spread), lean=_lean(len(spread)))
    return {"id": f"E{number:02d}", "kind": spec.kind, "direction": DIRECTION[spec.kind],
            "root": pages[spec.root], "nodes": nodes, "start": stamps[spec.start],
            "end": stamps[spec.end] if spec.end < len(stamps) else _after(stamps[-1]),
            "alert_expected": spec.alert_expected, "root_changes_traffic": spec.root_changes_traffic,
            "note": note}


def _lean(count: int) -> str:
    """Tail of the outage note: how many pages relying on the root went down with it."""
    if count == 0:
        return ""
    return f"; {count} page{'s' if count > 1 else ''} relying on it lost at least half of their visits"


def _after(stamp: str) -> str:
    """The hour after an ISO hour stamp (the exclusive end of the recording)."""
    moment = datetime.strptime(stamp, "%Y-%m-%dT%H:%M:%SZ") + timedelta(hours=1)
    return moment.strftime("%Y-%m-%dT%H:%M:%SZ")


def label_events(specs: list[EventSpec], ctx: PlanContext, human: np.ndarray, stamps: list[str]) -> list[dict]:
    """Labels of all planned events, ordered by start hour then root page, numbered E01...

    ``human`` holds the expected human visits with the events applied; comparing it with
    ``ctx.normal`` decides which downstream pages count as propagated.
    """
    ordered = sorted(specs, key=lambda s: (s.start, s.root, s.kind))
    return [_label(spec, ctx, human, stamps, k + 1) for k, spec in enumerate(ordered)]
