"""Outside check of the flow learner on real trips whose flows are known: bike share, 2014.

Data: ``tests/data/bikeshare-2014`` (326,339 trips of one metropolitan bike-share system in
2014; CC0; provenance in that folder's README). Every trip's start and end station and
time are known, so the true flow along each station pair is known hour by hour and the
learner's estimates can be compared with it. That known truth, and not anything in this
project, is what makes these outside checks.

The network of series: each station ``o`` has a departures node ``dep:o`` (trips starting
at ``o`` in UTC hour ``t``) and an arrivals node ``arr:o`` (trips ending at ``o`` in hour
``t``). There is one directed edge ``dep:o -> arr:d`` for every station pair (``o == d``
included: two different nodes) that carried at least ``MIN_EDGE_TRIPS`` = 10 trips over the
year (about one a month). Arrivals at ``d`` in hour ``t`` are the trips that started in hour
``t`` (lag 0) or ``t - 1`` (lag 1) -- or, for about 2.5 % of trips, earlier still.

Truth per edge ``o -> d`` and lag ``k``: (trips ``o -> d`` ending ``k`` UTC hours after the
hour they start) / (all departures from ``o``). The learner sees only the hourly counts:
lags 0-1, forgetting off (decreasing steps plus averaging), age weighting off, the
baseline off (``b = 0``, so raw arrivals are regressed on raw departures), conservation
cap 1.0, bound [0, 1], prior 0. Counts are small and bursty: about 0.5 departures per
station-hour, and an arrivals node has a median of 22 in-edges (1,538 edges in all) whose
departures all peak at the same commute hours, so the shares are only weakly identified
by the counts.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
from scipy import stats

from alerter.flows import FlowLearner, FlowSettings

DATA = Path(__file__).parent / "data" / "bikeshare-2014" / "trips.csv.gz"
MIN_EDGE_TRIPS = 10  # an edge for every station pair with >= 10 trips over the year
MIN_PAIR_TRIPS = 200  # pairs compared with the truth: >= 200 trips over the year
SURGE_MIN = 5  # surge: arrivals >= max(SURGE_MIN, SURGE_FACTOR x mean at that UTC hour of day)
SURGE_FACTOR = 3.0
TOP_TRUE = 3  # "among the true top contributors" = within the top 3 by trip count, ties included

BASE = dict(lags=1, age_weighting=False, cap=1.0, beta_min=0.0, beta_max=1.0, prior=0.0)


# -- building the network from the trips ---------------------------------------------------
@pytest.fixture(scope="module")
def bikes() -> dict:
    """Hourly counts, edges, true shares and per-surge true contributors, from the trips."""
    trips = np.loadtxt(DATA, delimiter=",", skiprows=1, dtype=np.int64)
    start, end, o_raw, d_raw = trips.T
    h0 = int(start.min()) // 3600
    hs, he = start // 3600 - h0, end // 3600 - h0
    hours = int(hs.max()) + 2  # the last start hour plus one, so its lag-1 arrivals count
    ids = np.unique(np.concatenate([o_raw, d_raw]))
    s = ids.size
    o, d = np.searchsorted(ids, o_raw), np.searchsorted(ids, d_raw)
    n = 2 * s  # nodes 0..s-1: dep:<station>, s..2s-1: arr:<station>
    dep = np.bincount(hs * n + o, minlength=hours * n).reshape(hours, n)
    inside = he < hours  # trips ending after the last hour are left out of the arrivals
    arr = np.bincount(he[inside] * n + s + d[inside], minlength=hours * n).reshape(hours, n)
    x = (dep + arr).astype(np.float64)

    pair = o * s + d
    pair_trips = np.bincount(pair, minlength=s * s)
    keys = np.flatnonzero(pair_trips >= MIN_EDGE_TRIPS)  # sorted by (o, d)
    order = np.argsort(keys % s, kind="stable")  # destination-sorted: in-edges contiguous
    keys = keys[order]
    src, dst = keys // s, s + keys % s
    indptr = np.searchsorted(dst, np.arange(s, 2 * s + 1))
    departures = np.bincount(o, minlength=s).astype(float)
    lag = he - hs
    truth = np.stack([np.bincount(pair[lag == k], minlength=s * s)[keys] / departures[src] for k in (0, 1)])

    # surges of arrivals, defined from the counts alone (not the engine's rule)
    hod = (np.arange(hours) + h0) % 24
    mean_hod = np.stack([x[hod == h, s:].mean(axis=0) for h in range(24)])  # (24, stations)
    surge = x[:, s:] >= np.maximum(SURGE_MIN, SURGE_FACTOR * mean_hod[hod])
    by_end = np.argsort(he * s + d, kind="stable")
    end_key = (he * s + d)[by_end]
    surges: dict[int, list[tuple[int, np.ndarray]]] = {}
    for t, st in np.argwhere(surge).tolist():
        lo, hi = np.searchsorted(end_key, [t * s + st, t * s + st + 1])
        counts = np.bincount(o[by_end[lo:hi]], minlength=s)  # true contributors by trip count
        surges.setdefault(t, []).append((st, counts))
    return dict(x=x, n=n, s=s, hours=hours, src=src, dst=dst, indptr=indptr, truth=truth,
                pair_trips=pair_trips[keys], surges=surges, mean_dep=float(dep[:, :s].mean()))


def _run(b: dict, **settings) -> dict:
    """One pass over the year; records the top-named upstream station of every surge."""
    fl = FlowLearner(FlowSettings(**{**BASE, **settings}))
    fl.resize(b["n"], b["src"], b["dst"])
    zeros = np.zeros(b["n"])
    x, src, indptr = b["x"], b["src"], b["indptr"]
    truth = b["truth"]
    named = []  # per surge: (learner hit, busiest hit, random-pick chance, true-shares hit)
    skipped = 0
    for t in range(b["hours"]):
        step = fl.observe(x[t], zeros, None)  # attribution is made before learning hour t
        for st, counts in b["surges"].get(t, ()):
            lo, hi = int(indptr[st]), int(indptr[st + 1])
            capped = step.attribution.capped[lo:hi]
            if hi == lo or capped.max() <= 0.0:
                skipped += 1
                continue
            top3 = max(int(np.sort(counts)[-TOP_TRUE]), 1)  # ties at the third count included
            srcs = src[lo:hi]
            learner = srcs[int(np.argmax(capped))]
            busiest = srcs[int(np.argmax(x[t, srcs] + (x[t - 1, srcs] if t else 0.0)))]  # naive pick
            prev = x[t - 1, srcs] if t else 0.0
            oracle = srcs[int(np.argmax(truth[0, lo:hi] * x[t, srcs] + truth[1, lo:hi] * prev))]
            named.append((counts[learner] >= top3, counts[busiest] >= top3,
                          float(np.mean(counts[srcs] >= top3)), counts[oracle] >= top3))
    return dict(coef=np.asarray(fl.coefficients, dtype=float), named=np.array(named, dtype=float),
                skipped=skipped)


@pytest.fixture(scope="module")
def averaged(bikes) -> dict:
    return _run(bikes, forgetting=False)


@pytest.fixture(scope="module")
def forgetting(bikes) -> dict:
    return _run(bikes, forgetting=True)  # constant step 0.05 (the default)


def _errors(coef: np.ndarray, truth: np.ndarray, big: np.ndarray, k: int) -> dict:
    c, tr = coef[k, big], truth[k, big]
    err = np.abs(c - tr)
    return dict(mae=float(np.median(err)), within=float(np.mean(err <= 0.05)), rel=float(np.median(err / tr)),
                rel30=float(np.mean(err <= 0.3 * tr)), pearson=float(stats.pearsonr(c, tr)[0]),
                spearman=float(stats.spearmanr(c, tr)[0]), zero_mae=float(np.median(tr)),
                scale=float(c.sum() / tr.sum()))


# -- checks ------------------------------------------------------------------------------------
def test_counts_are_small_and_bursty(bikes):
    """The data are as the docstring says: about half a departure per station-hour.

    Source: tests/data/bikeshare-2014/README.md ("about half a departure per hour").
    Asserted 0.3 <= mean <= 0.8; measured 0.53. The pair threshold leaves several hundred
    pairs to compare (asserted >= 300; measured 479).
    """
    assert 0.3 <= bikes["mean_dep"] <= 0.8
    assert int((bikes["pair_trips"] >= MIN_PAIR_TRIPS).sum()) >= 300


def test_learned_shares_match_true_trip_shares(bikes, averaged):
    """Learned lag-0 and lag-1 coefficients against the true trip shares (pairs >= 200 trips).

    Source: the trips themselves (tests/data/bikeshare-2014, CC0): true share of edge o -> d
    at lag k = trips o -> d ending k UTC hours after their start hour / departures from o.
    Error measures over the 479 pairs with >= 200 trips, measured when written:

    - lag 0: median |learned - true| 0.0185 (asserted <= 0.025), fraction within +-0.05
      0.850 (>= 0.80), fraction within 30 % of the truth 0.28 (>= 0.20), Pearson 0.908
      (>= 0.85), Spearman 0.570 (>= 0.45); the all-zero guess has median error 0.036
      (asserted: learner <= 0.7 x that). Sum learned / sum true 0.78 (asserted in
      [0.6, 1.1]): the estimates are low on average, because noise-fitted coefficients on
      weak edges use up part of each source's conservation cap of 1.
    - lag 1: median error 0.0046 (<= 0.008), within +-0.05 0.992 (>= 0.95), Pearson 0.772
      (>= 0.65), Spearman 0.33 (reported only); all-zero guess median error 0.0067 (asserted
      learner < that).

    Relative errors are large (median |learned - true| / true 0.52 at lag 0, 0.58 at lag 1;
    reported only): with ~0.5 departures per station-hour and ~22 co-peaking in-edges per
    arrival node the counts identify small shares poorly.
    """
    big = bikes["pair_trips"] >= MIN_PAIR_TRIPS
    e0 = _errors(averaged["coef"], bikes["truth"], big, 0)
    e1 = _errors(averaged["coef"], bikes["truth"], big, 1)
    print(f"\npairs {int(big.sum())}; lag0 {e0}; lag1 {e1}")
    # Source: the trip records (known flows), see docstring
    assert e0["mae"] <= 0.025
    assert e0["within"] >= 0.80
    assert e0["rel30"] >= 0.20
    assert e0["pearson"] >= 0.85
    assert e0["spearman"] >= 0.45
    assert e0["mae"] <= 0.7 * e0["zero_mae"]
    assert 0.6 <= e0["scale"] <= 1.1
    assert e1["mae"] <= 0.008
    assert e1["within"] >= 0.95
    assert e1["pearson"] >= 0.65
    assert e1["mae"] < e1["zero_mae"]


def test_surge_attribution_names_a_true_top_contributor(bikes, averaged):
    """The top-named upstream station of an arrivals surge is among its true top 3 senders.

    Surge (defined here, not by the engine's rule): arrivals at station d in UTC hour t >=
    max(5, 3 x the mean arrivals at d in that UTC hour of day over the year). Named: the
    in-edge with the largest ``capped`` contribution in ``FlowStep.attribution`` of that
    hour (made before learning it; baseline off, so the whole count is the "excess").
    Truth: the departure stations of the trips that ended at d in hour t, counted from the
    trips; a hit is a named station within the top 3 by trip count, ties included.

    Source: the trip records (known contributors). Measured: 4,102 surge station-hours, 4,099
    scored (3 skipped: no in-edge or no positive contribution; asserted >= 2,000 scored);
    hit rate 0.527 (asserted >= 0.45); naming the in-edge with the most departures in hours
    t and t-1 scores 0.495 (asserted: learner above it); a uniformly random in-edge 0.137 on
    average (asserted: learner >= 2 x that). Printed for context, not asserted: the true
    shares in the same formula (beta0 * dep(t) + beta1 * dep(t-1)) score 0.680, so most of
    the gap to a perfect score is in the counts and the learned coefficients.
    The baseline stays off here (b = 0), as in the coefficient check; a seasonal mean per
    node and UTC hour of day as ``b`` scored about the same in a side run (0.534 vs 0.524 with
    an edge for every pair with >= 1 trip), so it is not used.
    """
    named = averaged["named"]
    rate, naive, chance, oracle = named.mean(axis=0)
    print(f"\nsurges scored {named.shape[0]}, skipped {averaged['skipped']}; learner {rate:.3f}, "
          f"busiest in-edge {naive:.3f}, random in-edge {chance:.3f}, true shares {oracle:.3f}")
    # Source: the trip records (true contributors of each surge hour)
    assert named.shape[0] >= 2000
    assert rate >= 0.45
    assert rate > naive
    assert rate >= 2.0 * chance


def test_constant_step_learner_on_the_same_year(bikes, forgetting):
    """Same comparison with ``forgetting=True`` (constant step 0.05): reported, loosely bounded.

    Source: the trip records (known flows). Measured when written: lag 0 median error
    0.0197, within +-0.05 0.825, Pearson 0.871, Spearman 0.461, sum learned / sum true 0.72;
    lag 1 median error 0.0060 (all-zero guess 0.0067), Pearson 0.408, Spearman 0.164; surge
    hit rate 0.513. Asserted only loose floors (lag 0 median error <= 0.03, Pearson >= 0.8;
    hit rate >= 0.4): a constant step keeps tracking recent hours, so with counts this
    small its coefficients stay noisier than the averaged ones, most visibly at lag 1.
    """
    big = bikes["pair_trips"] >= MIN_PAIR_TRIPS
    e0 = _errors(forgetting["coef"], bikes["truth"], big, 0)
    e1 = _errors(forgetting["coef"], bikes["truth"], big, 1)
    rate = float(forgetting["named"][:, 0].mean())
    print(f"\nforgetting: lag0 {e0}; lag1 {e1}; surge hit rate {rate:.3f}")
    # Source: the trip records (known flows and contributors)
    assert e0["mae"] <= 0.03
    assert e0["pearson"] >= 0.8
    assert rate >= 0.4
