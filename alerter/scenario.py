"""The invented demo scenario: three weeks of hourly visits to the "Fernhollow Courier".

Fernhollow is a fictional town and its Courier a fictional local news site; every number
here is made up, for the demo and the tests only. The generator builds a link graph of
pages (front page, eight sections, articles with related links), hourly visits that follow
the local clock of America/Denver, and, in week 3, labelled events (see
``scenario_events``). It is a pure function of the seed: no wall clock, no I/O until
``write_scenario``.

Traffic model, per page ``i`` and hour ``t`` (lag 0 along links)::

    human_i(t) = avail_i(t) * (external_i(t) + sum_j share_ji(t) * human_j(t))
    count_i(t) ~ Poisson(Gamma(k, 1/k) * (human_i(t) + bots_i(t)))

Links only run from a lower to a higher topological index (front page, then sections, then
articles newest first; an article links to older ones), so the sum is evaluated level by
level with one sparse product per level and per stretch of hours with a fixed graph.
"""

from __future__ import annotations

import gzip
import io
import json
from dataclasses import dataclass
from datetime import UTC, datetime, timedelta
from pathlib import Path
from typing import Any
from zoneinfo import ZoneInfo

import numpy as np
import scipy.sparse as sp

from . import scenario_events as events
from .scenario_events import EdgeChange, PlanContext

__all__ = ["Scenario", "generate", "write_scenario", "SITE", "TZ", "START", "HOURS", "DEFAULT_SEED"]

SITE = "Fernhollow Courier"
TZ = "America/Denver"
START = datetime(2026, 11, 2, 7, tzinfo=UTC)  # Monday 00:00 local (MST, -07:00 all three weeks)
HOURS = 504
WEEK3 = 336
DEFAULT_SEED = 20261102
RECORDING_NAME = "demo_week.jsonl.gz"
LABELS_NAME = "demo_labels.json"
DISPERSION = 60.0  # gamma shape k: count CV beyond Poisson is 1/sqrt(k), about 13 %

# section: (share of articles, weights of the morning/lunch/evening peaks, weekday, weekend)
SECTIONS: tuple[tuple[str, float, tuple[float, float, float], float, float], ...] = (
    ("news", 0.28, (1.0, 0.7, 0.8), 1.0, 0.85),
    ("sports", 0.15, (0.5, 0.6, 1.3), 0.9, 1.5),
    ("weather", 0.06, (1.4, 0.5, 0.6), 1.0, 1.1),
    ("culture", 0.10, (0.4, 0.6, 1.1), 0.95, 1.2),
    ("business", 0.11, (1.1, 0.9, 0.4), 1.05, 0.5),
    ("opinion", 0.10, (0.9, 0.8, 0.9), 1.0, 0.9),
    ("food", 0.10, (0.4, 1.1, 1.0), 0.95, 1.25),
    ("outdoors", 0.10, (0.8, 0.5, 0.8), 0.9, 1.4),
)
FRONT_STYLE = ((1.0, 0.8, 0.9), 1.0, 0.85)
N_SECTIONS = len(SECTIONS)
FIRST_ARTICLE = 1 + N_SECTIONS
SECTION_LINKS = 24  # a section page links to its newest articles
FEATURED = 6  # articles linked from the front page at any time


@dataclass(frozen=True)
class Scenario:
    """One generated scenario: the recording lines, the labels and some ground truth.

    ``lines`` are the recording's JSON objects in file order, ``labels`` the labels file's
    object. ``pages`` lists page ids in topological order (row order of ``expected``);
    ``expected`` holds the expected visits (humans plus bots, events included) per page and
    hour, ``normal`` the same without the labelled events; ``max_out_share`` is the largest
    total click-out share of any page at any hour.
    """

    seed: int
    lines: tuple[dict[str, Any], ...]
    labels: dict[str, Any]
    pages: tuple[str, ...]
    expected: np.ndarray
    normal: np.ndarray
    max_out_share: float


@dataclass(frozen=True)
class Site:
    """The pages and their links through time, before any labelled event."""

    pages: tuple[str, ...]
    style: np.ndarray  # rhythm style per page: 0 front, 1 + section index otherwise
    level: np.ndarray  # mean external visits per hour
    published: np.ndarray  # first hour a page exists
    changes: tuple[EdgeChange, ...]  # initial links (hour 0) and background churn
    touched: np.ndarray  # pages moved by background churn: not used for events


def clock(start: datetime = START, hours: int = HOURS, tz: str = TZ) -> tuple[np.ndarray, np.ndarray, list[str]]:
    """Local hour of day, local weekday (Monday 0) and UTC stamp of every hour."""
    zone = ZoneInfo(tz)
    moments = [start + timedelta(hours=h) for h in range(hours)]
    local = [m.astimezone(zone) for m in moments]
    hod = np.array([m.hour for m in local], dtype=np.int64)
    dow = np.array([m.weekday() for m in local], dtype=np.int64)
    return hod, dow, [m.strftime("%Y-%m-%dT%H:%M:%SZ") for m in moments]


def daily_profile(weights: tuple[float, float, float]) -> np.ndarray:
    """24 hourly multipliers (mean 1): a night floor plus morning, lunch and evening peaks.

    The floor keeps 3-5 am low but not empty. Weekends keep the shape and change the level
    (see ``rhythm``), so hour of day and day of week act as separate factors.
    """
    hours = np.arange(24, dtype=float)
    centres = np.array([7.5, 12.5, 20.5, 14.5])  # the last one: a broad daytime plateau
    widths = np.array([1.3, 1.3, 2.4, 4.5])
    gap = np.abs(hours[:, None] - centres[None, :])
    gap = np.minimum(gap, 24.0 - gap)
    shape = 0.1 + (np.exp(-0.5 * (gap / widths) ** 2) * np.asarray([*weights, 0.6])).sum(axis=1)
    return shape / shape.mean()


def rhythm(hod: np.ndarray, dow: np.ndarray, rng: np.random.Generator) -> np.ndarray:
    """Multiplier per style (front, then each section) and hour: daily x weekly x day noise."""
    styles = [FRONT_STYLE] + [(w, wd, we) for _, _, w, wd, we in SECTIONS]
    weekend = dow >= 5
    rows = []
    for weights, weekday_factor, weekend_factor in styles:
        rows.append(daily_profile(weights)[hod] * np.where(weekend, weekend_factor, weekday_factor))
    day = np.arange(hod.shape[0]) // 24
    day_noise = np.exp(rng.normal(0.0, 0.05, size=(len(styles), int(day.max()) + 1)))
    return np.asarray(rows) * day_noise[:, day]


def preferential_links(rng: np.random.Generator, section: np.ndarray) -> list[tuple[int, int]]:
    """Related links between articles by creation index (new -> older), heavy-tailed in-degree.

    An article picks 1-4 older articles with probability proportional to (in-degree + 1),
    three times as likely within its own section: linear preferential attachment, which
    gives the power-law in-degree typical of link graphs.
    """
    n = section.shape[0]
    indeg = np.zeros(n)
    out: list[tuple[int, int]] = []
    wanted = rng.choice(np.arange(1, 5), size=n, p=[0.15, 0.3, 0.35, 0.2])
    for c in range(1, n):
        weight = (indeg[:c] + 1.0) * np.where(section[:c] == section[c], 3.0, 1.0)
        targets = rng.choice(c, size=min(int(wanted[c]), c), replace=False, p=weight / weight.sum())
        indeg[targets] += 1.0
        out.extend((c, int(t)) for t in np.sort(targets))
    return out


def _scaled(shares: np.ndarray, cap: float) -> np.ndarray:
    """Shares shrunk proportionally so that they sum to at most ``cap``."""
    total = float(shares.sum())
    return shares * (cap / total) if total > cap else shares


def _front_changes(rng: np.random.Generator, fresh: np.ndarray, topo: np.ndarray) -> list[EdgeChange]:
    """Front page -> sections, plus featured articles rotated every other morning in weeks 1-2.

    Rotation happens during warm-up only, so that week 3 holds no unlabelled front-page swap.
    """
    changes = [EdgeChange(0, "add", 0, 1 + s, float(v))
               for s, v in enumerate(_scaled(rng.uniform(0.02, 0.08, N_SECTIONS), 0.40))]
    pool = [int(topo[c]) for c in rng.permutation(fresh)]
    featured = pool[:FEATURED]
    changes += [EdgeChange(0, "add", 0, p, float(rng.uniform(0.006, 0.012))) for p in featured]
    for k, day in enumerate(range(1, 14, 2)):
        hour = 24 * day + 6
        gone, new = featured.pop(0), pool[FEATURED + k]
        featured.append(new)
        changes += [EdgeChange(hour, "remove", 0, gone, 0.0),
                    EdgeChange(hour, "add", 0, new, float(rng.uniform(0.006, 0.012)))]
    return changes


def _section_changes(rng: np.random.Generator, section: np.ndarray, n_old: int, published: np.ndarray,
                     topo: np.ndarray) -> list[EdgeChange]:
    """Each section -> its newest articles (lead story strongest); new articles join on publication."""
    changes: list[EdgeChange] = []
    for s in range(N_SECTIONS):
        mine = np.flatnonzero(section[:n_old] == s)[::-1][:SECTION_LINKS]
        raw = np.exp(rng.uniform(np.log(0.005), np.log(0.05), mine.shape[0]))
        raw[:1] = rng.uniform(0.04, 0.05, min(1, mine.shape[0]))
        shares = _scaled(raw, 0.45)
        changes += [EdgeChange(0, "add", 1 + s, int(topo[c]), float(v)) for c, v in zip(mine, shares, strict=True)]
        total = float(shares.sum())
        for c in np.flatnonzero(section[n_old:] == s) + n_old:
            share = min(float(np.exp(rng.uniform(np.log(0.01), np.log(0.04)))), 0.55 - total)
            total += share
            changes.append(EdgeChange(int(published[topo[c]]), "add", 1 + s, int(topo[c]), share))
    return changes


def build_site(rng: np.random.Generator, n_pages: int, n_new: int) -> Site:
    """Pages, popularity and links (initial graph plus unlabelled churn) of the Courier."""
    n_art = n_pages - FIRST_ARTICLE
    n_old = n_art - n_new
    section = rng.choice(N_SECTIONS, size=n_art, p=[s[1] for s in SECTIONS])
    topo = FIRST_ARTICLE + (n_art - 1 - np.arange(n_art))  # creation index -> page index
    names = ["/"] + [f"/{s[0]}" for s in SECTIONS] + [""] * n_art
    for c in range(n_art):
        names[topo[c]] = f"/{SECTIONS[section[c]][0]}/a{c:04d}"
    published = np.zeros(n_pages, dtype=np.int64)
    published[topo[n_old:]] = np.sort(rng.integers(18, HOURS - 24, n_new))
    style = np.zeros(n_pages, dtype=np.int64)
    style[1:FIRST_ARTICLE] = np.arange(1, N_SECTIONS + 1)
    style[topo] = section + 1
    level = np.clip(np.exp(rng.normal(np.log(3.0), 1.5, n_pages)), 0.4, None)
    level[0] = 22000.0
    level[1:FIRST_ARTICLE] = np.exp(rng.normal(np.log(600.0), 0.6, N_SECTIONS))
    fresh = np.arange(n_old - 40, n_old)
    changes = _front_changes(rng, fresh, topo) + _section_changes(rng, section, n_old, published, topo)
    for c, t in preferential_links(rng, section):
        changes.append(EdgeChange(int(published[topo[c]]), "add", int(topo[c]), int(topo[t]),
                                  float(rng.uniform(0.01, 0.03))))
    touched = np.zeros(n_pages, dtype=bool)
    touched[topo[n_old:]] = True
    touched[[ch.dst for ch in changes if ch.src == 0 and ch.dst >= FIRST_ARTICLE]] = True
    base = Site(tuple(names), style, level, published, tuple(sorted(changes, key=lambda ch: ch.hour)), touched)
    return _with_churn(rng, base)


def _with_churn(rng: np.random.Generator, site: Site) -> Site:
    """Add a few random small-share article links and remove a few weak ones, over all weeks.

    Shares are calibrated on mean visits so a change moves its target by at most ~5 %.
    """
    n = len(site.pages)
    mean = propagate(site.level[:, None], [share_matrix(site.changes, 0, n)], [0, 1],
                     np.ones((n, 1)), levels(site.changes, n))[:, 0]
    state = edge_state(site.changes, HOURS)
    weak = [e for e in sorted(edge_state(site.changes, 0)) if e[0] >= FIRST_ARTICLE
            and state[e] * mean[e[0]] <= 0.05 * mean[e[1]]]
    extra: list[EdgeChange] = []
    touched = site.touched.copy()
    for k, hour in enumerate(np.sort(rng.integers(12, HOURS - 4, max(4, n // 120)))):
        if k % 3 == 2:
            src, dst = weak.pop(int(rng.integers(len(weak))))
            extra.append(EdgeChange(int(hour), "remove", src, dst, 0.0))
        else:
            src, dst = (int(v) for v in np.sort(rng.choice(np.arange(FIRST_ARTICLE, n), size=2, replace=False)))
            if (src, dst) in state or max(site.published[src], site.published[dst]) > hour:
                continue
            state[(src, dst)] = float(min(0.01, 0.05 * mean[dst] / mean[src]))
            extra.append(EdgeChange(int(hour), "add", src, dst, state[(src, dst)]))
        touched[[src, dst]] = True
    changes = tuple(sorted(site.changes + tuple(extra), key=lambda ch: ch.hour))
    return Site(site.pages, site.style, site.level, site.published, changes, touched)


def edge_state(changes: tuple[EdgeChange, ...] | list[EdgeChange], hour: int) -> dict[tuple[int, int], float]:
    """Links in force at ``hour`` (changes at that hour applied), as (src, dst) -> share."""
    state: dict[tuple[int, int], float] = {}
    for ch in changes:
        if ch.hour > hour:
            break
        if ch.op == "add":
            state[(ch.src, ch.dst)] = ch.share
        else:
            state.pop((ch.src, ch.dst), None)
    return state


def share_matrix(changes: tuple[EdgeChange, ...] | list[EdgeChange], hour: int, n: int) -> sp.csr_matrix:
    """CSR matrix of the shares in force at ``hour``: row = clicked-from page, column = target."""
    items = sorted(edge_state(changes, hour).items())
    src = np.array([k[0] for k, _ in items], dtype=np.int64)
    dst = np.array([k[1] for k, _ in items], dtype=np.int64)
    val = np.array([v for _, v in items], dtype=float)
    return sp.csr_matrix((val, (src, dst)), shape=(n, n))


def levels(changes: tuple[EdgeChange, ...] | list[EdgeChange], n: int) -> list[np.ndarray]:
    """Pages grouped by longest-path depth over every link that ever exists (a DAG)."""
    src = np.array([ch.src for ch in changes], dtype=np.int64)
    dst = np.array([ch.dst for ch in changes], dtype=np.int64)
    if np.any(src >= dst):
        raise ValueError("scenario links must run from a lower to a higher page index")
    depth = np.zeros(n, dtype=np.int64)
    while True:
        new = depth.copy()
        np.maximum.at(new, dst, depth[src] + 1)
        if np.array_equal(new, depth):
            break
        depth = new
    return [np.flatnonzero(depth == d) for d in range(int(depth.max()) + 1)]


def propagate(external: np.ndarray, matrices: list[sp.csr_matrix], bounds: list[int],
              avail: np.ndarray, groups: list[np.ndarray], rng: np.random.Generator | None = None) -> np.ndarray:
    """Human visits of every page and hour: external visits plus clicks in, level by level.

    ``matrices[k]`` holds the shares in force for hours ``bounds[k]..bounds[k+1]``. A page
    that is down (``avail`` 0) gets no visits and so sends no clicks. Without ``rng`` the
    result is the expected visits; with it each level's counts are drawn before they send
    clicks on, so a page's random ups and downs really reach the pages it links to (as
    they do on a real site, and as a flow model needs in order to learn the shares).
    """
    visits = np.zeros_like(external)
    for k, matrix in enumerate(matrices):
        cols = slice(bounds[k], bounds[k + 1])
        into = matrix.T.tocsr()
        for nodes in groups:
            inflow = into[nodes] @ visits[:, cols]
            rate = avail[nodes, cols] * (external[nodes, cols] + inflow)
            visits[nodes, cols] = rate if rng is None else draw_counts(rng, rate)
    return visits


def human_visits(changes: list[EdgeChange], external: np.ndarray, avail: np.ndarray,
                 rng: np.random.Generator | None = None) -> tuple[np.ndarray, float]:
    """Propagate over the stretches of hours with a fixed graph; also the largest out-share sum."""
    n, hours = external.shape
    cuts = sorted({0} | {ch.hour for ch in changes if 0 < ch.hour < hours})
    bounds = cuts + [hours]
    matrices = [share_matrix(changes, h, n) for h in cuts]
    out_max = max(float(np.asarray(m.sum(axis=1)).max()) for m in matrices)
    return propagate(external, matrices, bounds, avail, levels(changes, n), rng), out_max


def draw_counts(rng: np.random.Generator, rate: np.ndarray) -> np.ndarray:
    """Gamma-Poisson (negative binomial) integer counts around ``rate``."""
    return rng.poisson(rate * rng.gamma(DISPERSION, 1.0 / DISPERSION, size=rate.shape)).astype(np.int64)


def recording_lines(seed: int, pages: tuple[str, ...], changes: list[EdgeChange], counts: np.ndarray,
                    present: np.ndarray, stamps: list[str]) -> list[dict[str, Any]]:
    """Header, then per hour the edge changes taking effect and that hour's counts line."""
    lines: list[dict[str, Any]] = [{"type": "header", "format": "alerter-recording/1", "site": SITE, "tz": TZ,
                                    "start": stamps[0], "hours": len(stamps), "seed": seed}]
    by_hour: dict[int, list[EdgeChange]] = {}
    for ch in changes:
        by_hour.setdefault(ch.hour, []).append(ch)
    rows = counts.T.tolist()
    for t, stamp in enumerate(stamps):
        lines += [{"type": f"edge_{ch.op}", "ts": stamp, "src": pages[ch.src], "dst": pages[ch.dst]}
                  for ch in by_hour.get(t, [])]
        keep = np.flatnonzero(present[:, t]).tolist()
        lines.append({"type": "counts", "hour": stamp, "counts": {pages[i]: rows[t][i] for i in keep}})
    return lines


def generate(seed: int = DEFAULT_SEED, n_pages: int = 2000, n_new: int | None = None) -> Scenario:
    """Build the whole scenario from ``seed``: same seed, same scenario, byte for byte.

    ``n_pages`` counts every page (front page, 8 sections, articles including the ``n_new``
    published mid-recording; default about one in 160). At least 400 pages are needed so that
    each labelled event finds a page of decent volume.
    """
    if n_pages < 400:
        raise ValueError(f"n_pages must be at least 400 for the labelled events to fit, got {n_pages}")
    graph_rng, traffic_rng, event_rng, noise_rng = np.random.default_rng(seed).spawn(4)
    site = build_site(graph_rng, n_pages, max(4, n_pages // 160) if n_new is None else n_new)
    hod, dow, stamps = clock()
    alive = np.arange(HOURS)[None, :] >= site.published[:, None]
    external = site.level[:, None] * rhythm(hod, dow, traffic_rng)[site.style] * alive
    ones = np.ones_like(external)
    normal, _ = human_visits(list(site.changes), external, ones)
    ctx = PlanContext(site.pages, share_matrix(site.changes, WEEK3, n_pages), normal, external,
                      ~site.touched & (site.published == 0), WEEK3, FIRST_ARTICLE)
    plan = events.plan_events(event_rng, ctx)
    changes = sorted(list(site.changes) + plan.changes, key=lambda ch: ch.hour)
    human, out_max = human_visits(changes, external + plan.extra, plan.avail)
    labelled = events.label_events(plan.specs, ctx, human, stamps)
    drawn, _ = human_visits(changes, external + plan.extra, plan.avail, rng=noise_rng)
    counts = drawn.astype(np.int64) + noise_rng.poisson(plan.bots)
    lines = recording_lines(seed, site.pages, changes, counts, alive & ~plan.missing, stamps)
    labels = {"format": "alerter-labels/1", "site": SITE, "seed": seed, "labelled_from": stamps[WEEK3],
              "events": labelled}
    return Scenario(seed, tuple(lines), labels, site.pages, human + plan.bots, normal, out_max)


def recording_bytes(scenario: Scenario) -> bytes:
    """The gzip-compressed JSON Lines recording, reproducible (mtime 0, empty file name)."""
    text = "".join(json.dumps(line, separators=(",", ":"), sort_keys=True) + "\n" for line in scenario.lines)
    buffer = io.BytesIO()
    with gzip.GzipFile(filename="", mode="wb", fileobj=buffer, mtime=0, compresslevel=6) as handle:
        handle.write(text.encode("utf-8"))
    return buffer.getvalue()


def labels_bytes(scenario: Scenario) -> bytes:
    """The labels file: sorted keys, fixed separators, one trailing newline."""
    return (json.dumps(scenario.labels, separators=(",", ":"), sort_keys=True, indent=1) + "\n").encode("utf-8")


def write_scenario(scenario: Scenario, out_dir: str | Path) -> list[Path]:
    """Write ``demo_week.jsonl.gz`` and ``demo_labels.json`` into ``out_dir``; return both paths."""
    folder = Path(out_dir)
    folder.mkdir(parents=True, exist_ok=True)
    recording, labels = folder / RECORDING_NAME, folder / LABELS_NAME
    recording.write_bytes(recording_bytes(scenario))
    labels.write_bytes(labels_bytes(scenario))
    return [recording, labels]
