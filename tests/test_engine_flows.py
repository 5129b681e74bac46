"""The engine with the flow model on small planted graphs: attribution, imputation,
removed links, spill-over warnings. Planted truths, checked exactly where they are exact."""

from __future__ import annotations

from datetime import timedelta

import numpy as np
import pytest

from alerter.config import (
    BaselineSettings,
    CapacityRule,
    Config,
    IncidentSettings,
    PartialDirectionRule,
    RuleOverride,
    RuleSettings,
)
from alerter.edge_runs import Segments
from alerter.engine import Engine
from alerter.timeaxis import parse_hour

T0 = parse_hour("2026-11-02T07:00:00Z")
SHARE = 0.2  # planted: a fifth of the hub's visitors click through to the child


def _hub_child(hours: int, seed: int, surge_at: int | None = None, factor: float = 6.0):
    """Hub with Poisson traffic; child gets SHARE of the hub's visitors plus its own."""
    rng = np.random.default_rng(seed)
    t = np.arange(hours)
    hub_rate = 2000 * (1 + 0.5 * np.sin(2 * np.pi * (t % 24) / 24))
    if surge_at is not None:
        hub_rate[surge_at:surge_at + 3] *= factor
    hub = rng.poisson(hub_rate).astype(float)
    child = rng.binomial(hub.astype(int), SHARE) + rng.poisson(100, hours)
    return hub, child.astype(float)


def _run(config: Config, hub: np.ndarray, child: np.ndarray, missing_at: int | None = None,
         remove_at: int | None = None):
    eng = Engine(config)
    eng.add_edge("/hub", "/child", T0)
    results = []
    for h in range(len(hub)):
        if remove_at is not None and h == remove_at:
            assert eng.remove_edge("/hub", "/child", T0 + timedelta(hours=h))
        counts = {"/hub": hub[h], "/child": child[h]}
        if h == missing_at:
            del counts["/child"]
        results.append(eng.step(T0 + timedelta(hours=h), counts))
    return eng, results


def test_a_hub_surge_is_attributed_to_the_hub_and_grouped() -> None:
    surge = 24 * 14 + 10
    hub, child = _hub_child(24 * 15, seed=1, surge_at=surge)
    eng, results = _run(Config(), hub, child)
    alerts = {a.node: a for a in results[surge].alerts}
    assert set(alerts) == {"/hub", "/child"}
    assert alerts["/hub"].origin == "originating"
    top = alerts["/child"].upstream[0]
    assert top.node == "/hub" and alerts["/child"].origin == "propagated" and top.share >= 0.7
    assert sum(u.share for u in alerts["/child"].upstream) <= 1.0 + 1e-9
    # the learned share approaches the planted one (forgetting on, so within 30 %)
    beta = float(eng.joint.learner.coefficients[0, 0])
    assert abs(beta - SHARE) <= 0.3 * SHARE, beta
    (inc,) = {u.incident for u in results[surge].incidents}
    assert results[surge].incidents[-1].root == "/hub"


def test_a_missing_count_is_imputed_from_neighbours_and_never_alerted() -> None:
    gap = 24 * 14 + 10
    hub, child = _hub_child(24 * 15, seed=2, surge_at=gap)
    _, results = _run(Config(), hub, child, missing_at=gap)
    r = results[gap]
    i = 1  # "/child" was interned second
    assert np.isnan(r.observed[i]) and not any(a.node == "/child" for a in r.alerts)
    truth = SHARE * hub[gap] + 100
    own_only = r.own_expected[i]
    # filled from the hub's surge through the learned share: far above the own baseline,
    # within 30 % of the planted expectation
    assert r.imputed[i] > 2 * own_only
    assert abs(r.imputed[i] - truth) <= 0.3 * truth, (r.imputed[i], truth)


def test_a_removed_link_is_named_for_the_drop_it_causes() -> None:
    cut = 24 * 14 + 10
    hub, child = _hub_child(24 * 15, seed=3)
    child[cut:] -= np.random.default_rng(9).binomial(hub[cut:].astype(int), SHARE)
    _, results = _run(Config(), hub, child, remove_at=cut)
    drops = [a for r in results[cut:cut + 3] for a in r.alerts if a.node == "/child" and a.kind == "drop"]
    assert drops, "no drop alert after the link was removed"
    assert drops[0].upstream and drops[0].upstream[0].node == "/hub" and drops[0].upstream[0].link == "removed"


def test_spill_over_warning_for_a_downstream_node_over_capacity() -> None:
    surge = 24 * 14 + 10
    hub, child = _hub_child(24 * 15, seed=4, surge_at=surge, factor=8.0)
    quiet_child = RuleOverride(name="quiet", match=["/child"], surge=PartialDirectionRule(enabled=False))
    cfg = Config(incidents=IncidentSettings(capacity=[CapacityRule(match=["/child"], visits_per_hour=900)]),
                 rules=RuleSettings(overrides=[quiet_child]))
    _, results = _run(cfg, hub, child)
    assert [w for r in results[:surge] for w in r.spills] == []
    first = results[surge].spills
    # the hub's incident is open after its first surge hour; the next hour's forecast for
    # the child (its baseline plus SHARE of the hub's persisted excess) is far above 900
    assert [(w.node, w.via) for w in first] == [("/child", "/hub")]
    assert first[0].forecast > first[0].capacity == 900
    assert first[0].hour == "2026-11-16T18:00:00Z"  # the hour after the surge's first hour


def test_ghost_source_uses_its_owners_figures_and_never_alerts() -> None:
    """A partitioned worker's ghost: the hub, owned elsewhere, surges; the child's worker gets the
    hub's count and its owner's expectation. The hub never alerts there, while the child's
    alert is explained by it as in one engine holding both nodes."""
    from alerter.engine import Foreign

    hub, child = _hub_child(24 * 10, seed=5, surge_at=24 * 9 + 5)
    whole, part = Engine(Config()), Engine(Config())
    for eng in (whole, part):
        eng.add_edge("/hub", "/child", T0)
    ghost = np.array([True, False])
    got_alerts, want_alerts, hub_alerts = [], [], []
    for h in range(len(hub)):
        hour = T0 + timedelta(hours=h)
        want = whole.step(hour, {"/hub": hub[h], "/child": child[h]})
        foreign = Foreign(mask=ghost, own=want.own_expected)  # the owner's figure for the hub
        got = part.step_array(hour, part.counts_array({"/hub": hub[h], "/child": child[h]}), foreign=foreign)
        assert got.own_expected[0] == want.own_expected[0]
        got_alerts += got.alerts
        want_alerts += [a for a in want.alerts if a.node == "/child"]
        hub_alerts += [a for a in want.alerts if a.node == "/hub"]
    assert hub_alerts  # the hub does surge: one engine holding it alerts on it
    assert not [a for a in got_alerts if a.node == "/hub"]
    assert got_alerts and [(a.hour, a.kind, a.upstream[0].node) for a in got_alerts] == \
        [(a.hour, a.kind, a.upstream[0].node) for a in want_alerts]


def test_links_keep_their_coefficients_through_changes_and_a_re_added_link_starts_fresh() -> None:
    """Re-sync after link changes: every kept link keeps its learned coefficient (through a
    graph compaction too), a new link starts at the prior, and a link removed and added again
    between two hours starts at the prior as well (it is a new link, not the old one)."""
    hub, child = _hub_child(24 * 5, seed=4)
    eng, _ = _run(Config(), hub, child)
    for k in range(6):
        eng.add_edge(f"/side{k}", "/child", T0)
    hour = T0 + timedelta(hours=len(hub))
    counts = {"/hub": hub[-1], "/child": child[-1], **{f"/side{k}": 50.0 for k in range(6)}}
    for h in range(30):
        eng.step(hour + timedelta(hours=h), counts)
    joint = eng.joint
    prior = float(np.float32(joint.cfg.prior))  # the learner stores float32

    def coefficient(src: str, dst: str) -> float:
        pos = joint._position(eng.nodes.get(src), eng.nodes.get(dst))
        assert pos is not None
        return float(joint.learner.coefficients[0, pos])

    learned = {s: coefficient(s, "/child") for s in ["/hub", *(f"/side{k}" for k in range(6))]}
    assert all(v != prior for v in learned.values())  # they moved away from the prior
    later = hour + timedelta(hours=30)
    assert eng.remove_edge("/side0", "/child", later)
    eng.add_edge("/side0", "/child", later)  # removed and added again in the same hour
    eng.add_edge("/new", "/child", later)
    assert eng.remove_edge("/side1", "/child", later)
    eng.joint.graph.compact()  # slots renumbered: positions must follow their links
    eng.joint.sync()
    assert coefficient("/side0", "/child") == prior and coefficient("/new", "/child") == prior
    assert joint._position(eng.nodes.get("/side1"), eng.nodes.get("/child")) is None
    for s in ["/hub", *(f"/side{k}" for k in range(2, 6))]:
        assert coefficient(s, "/child") == learned[s], s


def _churning_engine(hours: int, seed: int) -> tuple[Engine, list]:
    """An engine over a random 60-node graph whose links change every hour (a few removed,
    a few new, new nodes now and then; the graph compacts every 15 hours or so)."""
    eng = Engine(Config(baseline=BaselineSettings(warmup_hours=24)))
    eng.graph.tail_limit = eng.graph.dead_limit = 60  # a compaction every 15 hours or so
    rng = np.random.default_rng(seed)
    for s, d in rng.integers(0, 60, size=(500, 2)).tolist():
        if s != d:
            eng.add_edge(f"/p{s}", f"/p{d}", T0)
    level = rng.uniform(20.0, 400.0, 70)
    alerts = []
    for h in range(hours):
        hour = T0 + timedelta(hours=h)
        if h:
            csr = eng.graph.csr()  # the learner follows the graph: its endpoints are the CSR's
            np.testing.assert_array_equal(eng.joint.learner.state.src, csr.src_sorted, err_msg=f"hour {h}")
            np.testing.assert_array_equal(eng.joint.learner.state.dst, csr.dst_sorted, err_msg=f"hour {h}")
            for p in rng.choice(csr.src_sorted.size, 4, replace=False).tolist():
                eng.remove_edge(eng.nodes.ids[int(csr.src_sorted[p])], eng.nodes.ids[int(csr.dst_sorted[p])], hour)
            for s, d in rng.integers(0, min(60 + h // 4, 70), size=(4, 2)).tolist():
                if s != d:
                    eng.add_edge(f"/p{s}", f"/p{d}", hour)
        n = min(60 + h // 4, 70)
        x = rng.poisson(level[:n] * (1.0 + 0.4 * np.sin(2 * np.pi * h / 24.0)) * (3.0 if h % 17 == 9 else 1.0))
        res = eng.step(hour, {f"/p{k}": float(v) for k, v in enumerate(x)})
        alerts.append([a.to_dict() for a in res.alerts])
    return eng, alerts


def test_moving_link_state_in_place_equals_gathering_it(monkeypatch: pytest.MonkeyPatch) -> None:
    """Hours whose links change move the learner's per-edge state inside its buffers and
    rewrite the links' endpoints and birth hours into theirs (``alerter.edge_room``); with
    no room anywhere all of it goes into new arrays. Both must give the same engine, bit for
    bit: every hour's alerts, the final coefficients, variances, observed hours, endpoints
    and birth hours; and every hour the learner's endpoints are the graph's CSR."""
    from alerter import edge_room, flow_kernels

    if not flow_kernels.AVAILABLE:
        pytest.skip("the in-place path needs the numba kernels (ALERTER_FLOW_KERNEL=numpy set)")
    moved = []
    real_move = edge_room.move
    monkeypatch.setattr(edge_room, "move", lambda *a: (moved.append(1), real_move(*a))[1])
    in_place, alerts_a = _churning_engine(72, seed=21)
    monkeypatch.setattr(edge_room, "room", lambda *a: None)  # no buffer has room: all new arrays
    gathered, alerts_b = _churning_engine(72, seed=21)
    assert len(moved) >= 3 * 40  # most hours moved their three arrays in place
    assert sum(map(len, alerts_a)) > 0 and alerts_a == alerts_b
    a, b = in_place.joint.learner.state, gathered.joint.learner.state
    for name in ("beta", "cov", "edge_hours", "src", "dst", "node_hours", "quad_mean"):
        np.testing.assert_array_equal(getattr(a, name), getattr(b, name), err_msg=name)
    csr = in_place.graph.csr()  # birth hours rewritten into their old buffer: the graph's, in CSR order
    np.testing.assert_array_equal(in_place.joint.born, in_place.graph.born[csr.order])
    np.testing.assert_array_equal(in_place.joint.born, gathered.joint.born)
    assert in_place.joint.graph.generation >= 3  # compactions (which reorder: gathered) along the way


def test_the_learner_takes_its_runs_from_the_graph_and_they_match_a_search() -> None:
    """After a re-sync the learner's per-destination runs come from the graph's CSR instead
    of a binary search per node; they must equal that search (``np.searchsorted`` over the
    sorted destinations) and the learner's sums must equal ``np.bincount``. An indptr that
    does not describe the edges is refused."""
    eng = Engine(Config())
    rng = np.random.default_rng(11)
    for s, d in rng.integers(0, 40, size=(300, 2)).tolist():
        if s != d:
            eng.add_edge(f"/p{s}", f"/p{d}", T0)
    eng.step(T0, {f"/p{k}": 10.0 + k for k in range(40)})
    for s, d in rng.integers(0, 45, size=(30, 2)).tolist():  # new nodes and links, some removals
        if s != d:
            eng.add_edge(f"/p{s}", f"/p{d}", T0 + timedelta(hours=1))
    csr = eng.graph.csr()
    for p in (0, 7, 99):  # three links that exist
        src, dst = eng.nodes.ids[int(csr.src_sorted[p])], eng.nodes.ids[int(csr.dst_sorted[p])]
        assert eng.remove_edge(src, dst, T0 + timedelta(hours=1))
    eng.step(T0 + timedelta(hours=1), {f"/p{k}": 10.0 + k for k in range(45)})
    learner = eng.joint.learner
    seg, dst = learner._segments(), learner.state.dst
    assert dst.size == eng.graph.n_edges
    n = learner.state.n_nodes
    np.testing.assert_array_equal(seg.indptr, np.searchsorted(dst, np.arange(n + 1)))
    values = rng.random(dst.size)
    np.testing.assert_allclose(learner.sum_into_dst(values), np.bincount(dst, values, minlength=n), rtol=1e-12)
    bad = seg.indptr.copy()
    bad[-1] += 1
    with pytest.raises(ValueError, match="indptr must be a non-decreasing"):
        Segments(dst, n, bad)


def test_incident_tracking_visits_only_nodes_beyond_their_band_with_the_same_result() -> None:
    """A storm of surges on a random graph: incidents tracked through the engine's lookup that
    lists who is beyond the band (visits only those) equal incidents tracked through a plain
    per-node lookup (visits every member of every open incident), update for update."""
    rng = np.random.default_rng(11)
    n = 300
    ids = [f"/p{i}" for i in range(n)]
    edges = {(int(s), int(d)) for s, d in rng.integers(0, n, size=(1500, 2)) if s != d}
    level = rng.lognormal(4.0, 1.0, n)
    engines = [Engine(Config()), Engine(Config())]
    for eng in engines:
        for s, d in sorted(edges):
            eng.add_edge(ids[s], ids[d], T0)
    got: list[list] = [[], []]
    for h in range(24 * 6):
        rate = level * (1 + 0.5 * np.sin(2 * np.pi * (h % 24) / 24))
        if h > 24 * 4 and h % 3 == 0:
            rate[rng.choice(n, 15, replace=False)] *= 8.0
        counts = dict(zip(ids, rng.poisson(rate).astype(float).tolist(), strict=True))
        hour = T0 + timedelta(hours=h)
        for k, eng in enumerate(engines):
            res = eng.step(hour, counts) if k == 0 else eng.step_array(hour, eng.counts_array(counts), track=False)
            if k == 1:
                res.incidents, _ = eng.track(hour, res.alerts, lambda node, d, e=eng: _last(e, node, d))
            got[k].extend(res.incidents)
    assert len(got[0]) > 50 and got[0] == got[1]


def _last(eng: Engine, node: str, direction: str) -> int | None:
    """``Engine.last_beyond`` of one node as a plain function (no listing of who is beyond)."""
    t = int(eng.last_beyond[direction][eng.nodes.get(node)])
    return None if t == np.iinfo(np.int64).min else t


def test_top_upstream_picks_equal_a_full_lexsort() -> None:
    """The partial selection of the top upstream links equals the first ``k`` of a full
    ``np.lexsort((src, -visits))`` (numpy as the reference), ties and NaN included."""
    from alerter.joint import _top
    rng = np.random.default_rng(12)
    for size, k in ((5, 3), (200, 3), (10_000, 5), (1000, 1)):
        for visits in (rng.random(size), np.round(rng.random(size) * 4), np.zeros(size)):
            src = rng.permutation(size)
            np.testing.assert_array_equal(_top(visits, src, k), np.lexsort((src, -visits))[:k])
        visits = rng.random(size)
        visits[rng.choice(size, min(size, 2), replace=False)] = np.nan
        src = rng.permutation(size)
        np.testing.assert_array_equal(_top(visits, src, k), np.lexsort((src, -visits))[:k])
