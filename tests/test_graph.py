"""LinkGraph against references: networkx for degrees and k-hop sets, plain loops for sums."""

from __future__ import annotations

import pickle
from pathlib import Path

import networkx as nx
import numpy as np
import pytest

from alerter.errors import UnknownNodeError
from alerter.graph import LinkGraph
from alerter.nodes import NodeIndex
from alerter.recording import EdgeEvent, read_recording
from alerter.timeaxis import hour_index

DEMO = Path(__file__).resolve().parents[1] / "replay_data" / "demo_week.jsonl.gz"
TINY = {"tail_limit": 3, "tail_fraction": 0.0, "dead_limit": 3, "dead_fraction": 0.0}
NEVER = {"tail_limit": 10**9, "dead_limit": 10**9}


# -- helpers -------------------------------------------------------------------------------
def alive_slots(g: LinkGraph) -> np.ndarray:
    return np.flatnonzero(g.alive[: g.n_slots])


def check_csr(g: LinkGraph) -> None:
    """The CSR is the stable dst-sort of the alive slots (numpy argsort as the reference);
    the slot order alone (what the flow learner's re-sync reads) is the same."""
    order, indptr = g.order_index()  # built first: csr() then adds its endpoints
    c = g.csr()
    slots = alive_slots(g)
    expected = slots[np.argsort(g.dst[slots], kind="stable")]
    np.testing.assert_array_equal(order, expected)
    np.testing.assert_array_equal(indptr, c.indptr)
    np.testing.assert_array_equal(c.order, expected)
    np.testing.assert_array_equal(c.src_sorted, g.src[expected])
    np.testing.assert_array_equal(c.dst_sorted, g.dst[expected])
    assert len(c.indptr) == len(g.nodes) + 1 and c.indptr[-1] == slots.size


def check_against_networkx(g: LinkGraph, ref: nx.DiGraph, sample: list[str], ks: tuple[int, ...]) -> None:
    """Degrees of every node and k-hop sets of ``sample`` equal networkx's on ``ref``."""
    ids = g.nodes.ids
    assert set(ids) == set(ref.nodes)
    np.testing.assert_array_equal(g.in_degree(), [ref.in_degree(v) for v in ids])  # networkx in_degree
    np.testing.assert_array_equal(g.out_degree(), [ref.out_degree(v) for v in ids])  # networkx out_degree
    assert g.n_edges == ref.number_of_edges()
    reverse = ref.reverse(copy=False)
    for v in sample:
        for k in ks:  # networkx single_source_shortest_path_length with cutoff=k
            assert g.hops(v, k, "down") == nx.single_source_shortest_path_length(ref, v, cutoff=k)
            assert g.hops(v, k, "up") == nx.single_source_shortest_path_length(reverse, v, cutoff=k)


def random_events(seed: int, n_events: int = 2000, n_nodes: int = 300) -> list[tuple[str, str, str]]:
    """Adds, removes, re-adds of removed edges and removes of absent edges; the node pool grows."""
    rng = np.random.default_rng(seed)
    alive: set[tuple[str, str]] = set()
    removed: list[tuple[str, str]] = []
    events = []
    for i in range(n_events):
        pool = min(n_nodes, 10 + i // 6)
        r = rng.random()
        if r < 0.15 and removed:
            edge = removed.pop(int(rng.integers(len(removed))))
            op = "add"
        elif r < 0.45 and alive:
            edge = sorted(alive)[int(rng.integers(len(alive)))]
            op = "remove"
        elif r < 0.5:
            edge, op = (f"/n{rng.integers(pool)}", f"/absent{i}"), "remove"
        else:
            a, b = rng.choice(pool, size=2, replace=False)
            edge, op = (f"/n{a}", f"/n{b}"), "add"
        if op == "add":
            alive.add(edge)
        elif edge in alive:
            alive.discard(edge)
            removed.append(edge)
        events.append((op, *edge))
    return events


def apply(g: LinkGraph, ref: nx.DiGraph, op: str, src: str, dst: str, hour: int) -> int | None:
    """Apply one event to both graphs; return the slot LinkGraph reported."""
    if op == "add":
        slot = g.add_edge(src, dst, hour)
        ref.add_edge(src, dst)
        return slot
    slot = g.remove_edge(src, dst)
    assert (slot is not None) == ref.has_edge(src, dst)
    if slot is not None:
        ref.remove_edge(src, dst)
    return slot


def fixed_graph() -> LinkGraph:
    g = LinkGraph(NodeIndex())
    for s, d in [("a", "b"), ("a", "c"), ("b", "c"), ("c", "d")]:
        g.add_edge(s, d, hour=7)
    g.nodes.intern(["e"])  # a node with no edges at all
    return g


# -- a small hand-checked example ----------------------------------------------------------
def test_fixed_example_by_hand() -> None:
    g = fixed_graph()
    assert g.in_degree().tolist() == [0, 1, 2, 1, 0]
    assert g.out_degree().tolist() == [2, 1, 1, 0, 0]
    c = g.csr()
    assert c.order.tolist() == [0, 1, 2, 3]
    assert c.indptr.tolist() == [0, 0, 1, 3, 4, 4]
    assert c.src_sorted.tolist() == [0, 0, 1, 2] and c.dst_sorted.tolist() == [1, 2, 2, 3]
    assert g.hops("a", 2, "down") == {"a": 0, "b": 1, "c": 1, "d": 2}
    assert g.hops("a", 1, "down") == {"a": 0, "b": 1, "c": 1}
    assert g.hops("d", 3, "up") == {"d": 0, "c": 1, "a": 2, "b": 2}
    assert g.hops("e", 3, "up") == {"e": 0} and g.hops("a", 0, "down") == {"a": 0}
    assert g.neighbours("c", "up") == ["a", "b"] and g.neighbours("c", "down") == ["d"]
    assert sorted(g.edges()) == [("a", "b"), ("a", "c"), ("b", "c"), ("c", "d")]


def test_add_remove_semantics() -> None:
    g = fixed_graph()
    assert g.add_edge("a", "b", hour=99) == 0 and g.born[0] == 7  # existing alive edge: no-op
    with pytest.raises(ValueError, match="'/loop'"):
        g.add_edge("/loop", "/loop", hour=1)
    assert "/loop" not in g.nodes
    assert g.remove_edge("a", "/nowhere") is None and "/nowhere" not in g.nodes
    assert g.remove_edge("b", "a") is None  # the reverse direction is a different edge
    assert g.remove_edge("a", "b") == 0 and g.slot_of("a", "b") is None
    assert g.remove_edge("a", "b") is None
    slot = g.add_edge("a", "b", hour=8)
    assert slot == 4 and g.born[slot] == 8 and g.slot_of("a", "b") == 4  # re-added: a new slot
    assert g.in_degree().tolist() == [0, 1, 2, 1, 0]
    with pytest.raises(ValueError, match="direction"):
        g.hops("a", 1, "sideways")
    with pytest.raises(UnknownNodeError):
        g.neighbours("/never", "up")


def test_subgraph_has_induced_edges_and_attributes() -> None:
    g = fixed_graph()
    g.register("w", np.float32, fill=0.5)
    g.register("pair", np.int64, fill=0, rows=2)
    g.array("w")[0, g.slot_of("b", "c")] = 2.0
    g.array("pair")[:, g.slot_of("a", "b")] = [3, 4]
    sub = g.subgraph("a", 1, "down", attrs=["w", "pair"])
    assert sorted(sub.edges()) == [("a", "b"), ("a", "c"), ("b", "c")]
    assert dict(sub.nodes(data="hops")) == {"a": 0, "b": 1, "c": 1}
    assert sub.edges["b", "c"]["w"] == 2.0 and sub.edges["a", "c"]["w"] == 0.5
    assert sub.edges["a", "b"]["pair"] == [3, 4] and sub.edges["a", "b"]["born"] == 7
    up = g.subgraph("d", 1, "up")
    assert sorted(up.edges()) == [("c", "d")]


# -- random replay against networkx ---------------------------------------------------------
@pytest.mark.parametrize("thresholds", [TINY, NEVER], ids=["compact-often", "never-compact"])
def test_random_replay_matches_networkx_after_every_event(thresholds: dict[str, float]) -> None:
    g, ref = LinkGraph(NodeIndex(), **thresholds), nx.DiGraph()
    rng = np.random.default_rng(11)
    generations = set()
    for hour, (op, src, dst) in enumerate(random_events(seed=5)):
        before = g.generation
        slot = apply(g, ref, op, src, dst, hour)
        ref.add_nodes_from(n for n in (src, dst) if n in g.nodes)  # interned nodes exist with degree 0
        if op == "add" and g.generation == before and g.born[slot] == hour:
            assert slot == g.n_slots - 1  # a fresh edge always takes a new slot at the end
        generations.add(g.generation)
        ids = g.nodes.ids
        sample = [ids[i] for i in rng.choice(len(ids), size=min(6, len(ids)), replace=False)]
        check_against_networkx(g, ref, sample, ks=(1, 2, 3))
        check_csr(g)
    assert len(g.nodes) > 250 and not any(v.startswith("/absent") for v in g.nodes.ids)  # new nodes appeared
    assert set(g.edges()) == set(ref.edges())
    assert (len(generations) > 20) == (thresholds is TINY)


def test_splices_after_bulk_load_match_networkx_and_loops() -> None:
    """A large sorted main segment with many pending removals and additions (never compacted)."""
    ids = [f"/n{i}" for i in range(80)]
    rng = np.random.default_rng(8)
    src, dst = rng.integers(80, size=1500), rng.integers(80, size=1500)
    src, dst = src[src != dst], dst[src != dst]
    g = LinkGraph.from_arrays(ids, src, dst, 0, **NEVER)
    ref = nx.DiGraph(zip([ids[i] for i in src], [ids[i] for i in dst], strict=True))
    for hour, (op, s, d) in enumerate(random_events(seed=12, n_events=400, n_nodes=90), start=1):
        if op == "remove" and ref.number_of_edges() and rng.random() < 0.5:
            s, d = list(ref.edges())[int(rng.integers(ref.number_of_edges()))]  # hit the main segment
        apply(g, ref, op, s, d, hour)
        ref.add_nodes_from(n for n in (s, d) if n in g.nodes)
        check_against_networkx(g, ref, list(rng.choice(g.nodes.ids, size=4, replace=False)), ks=(1, 2))
        check_csr(g)
        values = rng.normal(size=len(g.src))
        np.testing.assert_allclose(g.sum_into_dst(values), loop_sum(g, values), rtol=1e-12, atol=1e-12)
    assert g.generation == 0 and g.n_dead > 50 and g.n_slots - g.main > 50


# -- vectorised helpers against plain loops -------------------------------------------------
def churned_graph(seed: int, **thresholds: float) -> LinkGraph:
    g, ref = LinkGraph(NodeIndex(), **thresholds), nx.DiGraph()
    for hour, (op, src, dst) in enumerate(random_events(seed, n_events=600, n_nodes=80)):
        apply(g, ref, op, src, dst, hour)
    g.nodes.intern(["/late-a", "/late-b"])  # nodes interned after the last edge event
    return g


def loop_sum(g: LinkGraph, values: np.ndarray) -> np.ndarray:
    out = np.zeros(len(g.nodes))
    for slot in range(g.n_slots):
        if g.alive[slot]:
            out[g.dst[slot]] += values[slot]
    return out


@pytest.mark.parametrize("thresholds", [TINY, NEVER], ids=["compact-often", "never-compact"])
def test_sum_into_dst_equals_python_loop(thresholds: dict[str, float]) -> None:
    g = churned_graph(3, **thresholds)
    assert g.n_dead > 0 or g.n_slots > g.main or thresholds is TINY
    rng = np.random.default_rng(0)
    values = rng.normal(size=len(g.src))
    values[~g.alive] = np.nan  # dead slots must not leak in
    expected = loop_sum(g, values)
    assert (expected == 0).sum() >= 2 and np.isfinite(expected).all()
    np.testing.assert_allclose(g.sum_into_dst(values), expected, rtol=1e-12, atol=1e-12)
    g.compact()
    values = rng.normal(size=len(g.src))
    np.testing.assert_allclose(g.sum_into_dst(values), loop_sum(g, values), rtol=1e-12, atol=1e-12)


def test_gather_src_equals_python_loop() -> None:
    g = churned_graph(4)
    per_node = np.arange(len(g.nodes), dtype=float) * 10.0
    out = np.empty(g.n_slots)
    got = g.gather_src(per_node, out=out)
    assert got is out
    for slot in alive_slots(g):
        assert got[slot] == per_node[g.src[slot]]
    with pytest.raises(ValueError, match="entries"):
        g.gather_src(per_node[:-3])


def test_empty_graph() -> None:
    g = LinkGraph(NodeIndex())
    g.nodes.intern(["x", "y"])
    assert g.sum_into_dst(np.zeros(0)).tolist() == [0.0, 0.0]
    assert g.in_degree().tolist() == [0, 0] and g.out_degree().tolist() == [0, 0]
    assert g.edges() == [] and g.hops("x", 2, "down") == {"x": 0}


# -- registered arrays through compaction ---------------------------------------------------
def marker(g: LinkGraph, src: str, dst: str) -> list[float]:
    code = float(g.nodes.get(src) * 1000 + g.nodes.get(dst))
    return [code, -code]


def test_registered_arrays_follow_edges_through_compaction() -> None:
    g, ref = LinkGraph(NodeIndex(), capacity=4, **TINY), nx.DiGraph()
    g.register("mark", np.float64, fill=-1.0, rows=2)
    g.register("flag", np.int8, fill=7)
    start = g.generation
    for hour, (op, src, dst) in enumerate(random_events(seed=9, n_events=800, n_nodes=60)):
        slot = apply(g, ref, op, src, dst, hour)
        if op == "add" and g.born[slot] == hour:  # a new (or re-added) edge starts at fill
            assert g.array("mark")[:, slot].tolist() == [-1.0, -1.0] and g.array("flag")[0, slot] == 7
            g.array("mark")[:, slot] = marker(g, src, dst)
            g.array("flag")[0, slot] = hour % 100
        if hour % 97 == 0:
            g.compact()
        for s, d in ref.edges():
            assert g.array("mark")[:, g.slot_of(s, d)].tolist() == marker(g, s, d)
    assert g.generation - start > 50
    assert g.array("mark").shape == (2, len(g.src)) and len(g.src) >= g.n_slots > 4
    born_hour = {(s, d): int(g.born[g.slot_of(s, d)]) for s, d in ref.edges()}
    assert all(g.array("flag")[0, g.slot_of(*e)] == h % 100 for e, h in born_hour.items())


def test_register_twice_and_unknown_array_fail() -> None:
    g = fixed_graph()
    g.register("w", float, fill=0.0)
    with pytest.raises(ValueError, match="already"):
        g.register("w", float, fill=1.0)
    with pytest.raises(KeyError, match="registered"):
        g.array("nope")


# -- bulk loader and checkpoints ------------------------------------------------------------
def test_from_arrays_equals_incremental_build() -> None:
    ids = [f"/p{i}" for i in range(50)]
    rng = np.random.default_rng(2)
    src, dst = rng.integers(50, size=400), rng.integers(50, size=400)
    keep = src != dst
    src, dst, hours = src[keep], dst[keep], np.arange(keep.sum())
    bulk = LinkGraph.from_arrays(ids, src, dst, hours)
    inc = LinkGraph(NodeIndex())
    inc.nodes.intern(ids)
    for s, d, h in zip(src, dst, hours, strict=True):
        inc.add_edge(ids[s], ids[d], int(h))
    assert sorted(bulk.edges()) == sorted(inc.edges()) and bulk.n_edges < len(src)  # duplicates dropped
    np.testing.assert_array_equal(bulk.in_degree(), inc.in_degree())
    for s, d in inc.edges():  # first occurrence wins
        assert bulk.born[bulk.slot_of(s, d)] == inc.born[inc.slot_of(s, d)]
    check_csr(bulk)
    with pytest.raises(ValueError, match="'/p3'"):
        LinkGraph.from_arrays(ids, [1, 3], [2, 3], 0)
    with pytest.raises(ValueError, match="index arrays"):
        LinkGraph.from_arrays(ids, [1], [50], 0)


def test_pickle_round_trip_gives_identical_queries() -> None:
    g = churned_graph(6)
    g.register("coef", np.float32, fill=0.25, rows=3)
    g.array("coef")[:, : g.n_slots] = np.arange(3 * g.n_slots).reshape(3, -1)
    g.csr()  # a cached view must not break pickling
    nodes, h = pickle.loads(pickle.dumps((g.nodes, g)))
    assert h.nodes is nodes and h.generation == g.generation
    assert h.edges() == g.edges()
    np.testing.assert_array_equal(h.array("coef"), g.array("coef"))
    for v in g.nodes.ids:
        for direction in ("up", "down"):
            assert h.hops(v, 3, direction) == g.hops(v, 3, direction)
    first = g.edges()[0]
    slots = [(graph.remove_edge(*first), graph.add_edge("/n1", "/brand-new", 999)) for graph in (g, h)]
    assert slots[0] == slots[1] and slots[0][0] is not None  # same mutations, same slots
    np.testing.assert_array_equal(h.out_degree(), g.out_degree())


# -- the demo recording, if it has been generated -------------------------------------------
def test_demo_week_edges_match_networkx() -> None:
    if not DEMO.exists():
        pytest.skip(f"{DEMO} not generated yet")
    g, ref = LinkGraph(NodeIndex()), nx.DiGraph()
    rng = np.random.default_rng(1)
    n_events = 0
    for event in read_recording(DEMO):
        if not isinstance(event, EdgeEvent):
            continue
        hour = hour_index(event.ts)
        if event.src == event.dst:
            with pytest.raises(ValueError):
                g.add_edge(event.src, event.dst, hour)
            continue
        apply(g, ref, event.op, event.src, event.dst, hour)
        ref.add_nodes_from(n for n in (event.src, event.dst) if n in g.nodes)
        ids = g.nodes.ids
        sample = [ids[i] for i in rng.choice(len(ids), size=min(20, len(ids)), replace=False)]
        check_against_networkx(g, ref, sample, ks=(2,))
        n_events += 1
    assert n_events > 0 and set(g.edges()) == set(ref.edges())
