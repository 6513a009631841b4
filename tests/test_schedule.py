"""Liveness, execution-order search and arena planning (qfit.schedule), checked against brute force
over all topological orders, hand-computed chain peaks and an independent liveness walk."""
from __future__ import annotations

import itertools
import os
import random
import sys

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from onnx import TensorProto, helper, numpy_helper

from qfit.memory import budget
from qfit.memory import schedule
from qfit.graph.load import prepare_model
from qfit.quant.plan import make_plan

sys.path.insert(0, os.path.dirname(__file__))
import zoo  # noqa: E402


# ---- independent helpers (written from the definitions in docs/memory.md, not from qfit code) ----

def topological_orders(preds: list[set[int]]):
    """Every topological order of a small DAG (brute force)."""
    n = len(preds)

    def extend(order, done):
        if len(order) == n:
            yield list(order)
            return
        for v in range(n):
            if v not in done and preds[v] <= done:
                order.append(v)
                done.add(v)
                yield from extend(order, done)
                done.remove(v)
                order.pop()

    yield from extend([], set())


def walk_peak(sizes: dict[str, int], producer: dict[str, int | None], readers: dict[str, set[int]],
              outputs: set[str], order: list[int]) -> int:
    """Peak live bytes: a tensor is held from the step that produces it (graph inputs from the
    start) until the step of its last reader (graph outputs until the end)."""
    peak = 0
    for step in range(len(order)):
        live = 0
        for t, size in sizes.items():
            first = 0 if producer[t] is None else order.index(producer[t])
            last = max([order.index(r) for r in readers[t]] + [first])
            if t in outputs:
                last = len(order) - 1
            if first <= step <= last:
                live += size
        peak = max(peak, live)
    return peak


def assert_no_overlap(plan_rows: list[dict]) -> None:
    """No two buffers live at a common step share a byte of the arena."""
    rows = [r for r in plan_rows if r["size"] > 0]
    for a, b in itertools.combinations(rows, 2):
        same_time = a["first_step"] <= b["last_step"] and b["first_step"] <= a["last_step"]
        same_bytes = a["offset"] < b["offset"] + b["size"] and b["offset"] < a["offset"] + a["size"]
        assert not (same_time and same_bytes), f"{a['tensor']} and {b['tensor']} overlap in the arena"


# ---- random branched problems -------------------------------------------------------------------

@st.composite
def branched_problems(draw):
    """A source, 2-3 parallel branches of 1-3 nodes (with an optional cross edge), and a sink."""
    n_branches = draw(st.integers(2, 3))
    lengths = [draw(st.integers(1, 3)) for _ in range(n_branches)]
    preds: list[set[int]] = [set()]
    branch_nodes = []
    for length in lengths:
        nodes = []
        for k in range(length):
            preds.append({nodes[-1]} if nodes else {0})
            nodes.append(len(preds) - 1)
        branch_nodes.append(nodes)
    if draw(st.booleans()) and n_branches >= 2 and len(branch_nodes[1]) >= 2:
        preds[branch_nodes[1][-1]].add(branch_nodes[0][0])    # a skip edge across branches
    preds.append({nodes[-1] for nodes in branch_nodes})
    n = len(preds)
    sizes = [draw(st.sampled_from([0, 16, 100, 256, 1000, 4096])) for _ in range(n)]
    extra = [draw(st.sampled_from([0, 0, 64, 500])) for _ in range(n)]
    input_bytes = draw(st.sampled_from([0, 50, 300]))
    return preds, sizes, extra, input_bytes


def to_problem(preds, sizes, extra, input_bytes):
    n = len(preds)
    readers = [frozenset(j for j in range(n) if i in preds[j]) for i in range(n)]
    buffers = [schedule.Buffer("input", input_bytes, None, frozenset({0}))]
    buffers += [schedule.Buffer(f"t{i}", sizes[i], i, readers[i], is_output=(i == n - 1)) for i in range(n)]
    return schedule.MemoryProblem([f"n{i}" for i in range(n)], [frozenset(p) for p in preds], buffers, list(extra))


def brute_force_best(preds, sizes, extra, input_bytes) -> int:
    n = len(preds)
    best = None
    for order in topological_orders([set(p) for p in preds]):
        peak = 0
        for step, v in enumerate(order):
            live = extra[v]
            if step <= order.index(0):
                live += input_bytes
            for i in range(n):
                first = order.index(i)
                later_readers = [order.index(j) for j in range(n) if i in preds[j]]
                last = n - 1 if i == n - 1 else max(later_readers + [first])
                if first <= step <= last:
                    live += sizes[i]
            peak = max(peak, live)
        best = peak if best is None else min(best, peak)
    return best


@settings(max_examples=120, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(branched_problems())
def test_order_search_equals_brute_force_over_all_topological_orders(case):
    # Source: exhaustive enumeration of topological orders (the definition of the optimum).
    problem = to_problem(*case)
    result = schedule.search_order(problem, time_limit_s=30.0)
    assert result.method == "exact"
    assert schedule.is_topological(problem, result.order)
    assert result.peak_bytes == brute_force_best(*case)
    assert schedule.peak_of(problem, result.order) == result.peak_bytes


@settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(branched_problems())
def test_liveness_matches_an_independent_walk_in_the_default_order(case):
    # Source: the liveness definition (produced .. last reader; outputs to the end), walked directly.
    preds, sizes, _extra, input_bytes = case
    n = len(preds)
    problem = to_problem(preds, sizes, [0] * n, input_bytes)
    names = {"input": input_bytes, **{f"t{i}": sizes[i] for i in range(n)}}
    producer = {"input": None, **{f"t{i}": i for i in range(n)}}
    readers = {"input": {0}, **{f"t{i}": {j for j in range(n) if i in preds[j]} for i in range(n)}}
    order = list(range(n))
    live = schedule.liveness(problem, order)
    assert live.peak_bytes == walk_peak(names, producer, readers, {f"t{n - 1}"}, order)


@settings(max_examples=60, deadline=None)
@given(branched_problems(), st.sampled_from([1, 4, 16]))
def test_arena_plan_never_overlaps_live_buffers_and_is_at_least_the_peak(case, alignment):
    # Source: the definition of a valid arena plan; the peak of the order is a lower bound (common practice).
    problem = to_problem(*case)
    live = schedule.liveness(problem)
    items = [(b.name, b.size_bytes, f, l) for b, f, l in zip(problem.buffers, live.first_step, live.last_step)]
    placements, arena = schedule.plan_arena(items, alignment)
    rows = [{"tensor": p.name, "offset": p.offset, "size": p.size_bytes, "first_step": p.first_step,
             "last_step": p.last_step} for p in placements]
    assert_no_overlap(rows)
    assert all(p.offset % alignment == 0 for p in placements)
    no_extra_peak = max(sum(b.size_bytes for b, f, l in zip(problem.buffers, live.first_step, live.last_step)
                            if f <= s <= l) for s in range(len(problem.node_names)))
    assert arena >= no_extra_peak


def test_a_chain_keeps_its_order():
    # Source: a chain has exactly one topological order.
    n = 30
    preds = [set()] + [{i - 1} for i in range(1, n)]
    rng = random.Random(3)
    problem = to_problem(preds, [rng.choice([10, 1000, 50]) for _ in range(n)], [0] * n, 100)
    result = schedule.search_order(problem, 1.0)
    assert result.order == list(range(n)) and not result.changed


def test_ties_keep_the_default_order():
    # Two symmetric branches: every order has the same peak, so the graph's own order must be kept.
    preds = [set(), {0}, {0}, {1, 2}]
    problem = to_problem(preds, [8, 8, 8, 8], [0] * 4, 8)
    result = schedule.search_order(problem, 1.0)
    assert result.order == [0, 1, 2, 3] and not result.changed


def test_interleaved_expanding_branches_are_reordered_as_worked_by_hand():
    # Source: worked by hand; the effect Liberis & Lane 2019 describe. Two branches each expand
    # (A to 1000 B, B to 500 B) then shrink to 10 B. Graph order: src, A-expand, B-expand, A-shrink,
    # B-shrink, sink -> at B-expand t0 + 1000 + 500 = 1510 B are live. Finishing A first:
    # src 10, A-expand 10+1000, A-shrink 10+1000+10, B-expand 10+10+500, ... -> peak 1020 B.
    preds = [set(), {0}, {0}, {1}, {2}, {3, 4}]
    sizes = [10, 1000, 500, 10, 10, 20]
    problem = to_problem(preds, sizes, [0] * 6, 0)
    result = schedule.search_order(problem, 1.0)
    assert result.default_peak_bytes == 1510
    assert result.peak_bytes == 1020
    assert result.changed and result.method == "exact"


def test_search_on_a_200_node_branched_graph_returns_a_valid_order_within_its_limit():
    # Not timed (the benchmark prints times); checks the result is valid and never worse than default.
    rng = random.Random(0)
    n = 200
    preds = [set()]
    for i in range(1, n):
        preds.append(set(rng.sample(range(max(0, i - 12), i), min(rng.choice([1, 1, 2]), i))))
    problem = to_problem(preds, [rng.choice([100, 1000, 5000]) for _ in range(n)], [0] * n, 0)
    result = schedule.search_order(problem, time_limit_s=0.2)
    assert schedule.is_topological(problem, result.order)
    assert result.peak_bytes <= result.default_peak_bytes
    assert result.peak_bytes == schedule.peak_of(problem, result.order)
    assert result.method in ("exact", "heuristic")


# ---- on ONNX graphs -----------------------------------------------------------------------------

def _chain_model():
    """Conv(3->8, 3x3, p1) -> MaxPool 2x2 -> Conv(8->16, 3x3, p1) -> AveragePool 2x2 -> Conv(16->4, 1x1)
    on a 1x3x32x32 input; no activation functions, so every tensor is stored."""
    rng = np.random.default_rng(0)
    inits = [numpy_helper.from_array(rng.standard_normal(s).astype(np.float32), n) for n, s in
             (("w1", (8, 3, 3, 3)), ("w2", (16, 8, 3, 3)), ("w3", (4, 16, 1, 1)))]
    nodes = [helper.make_node("Conv", ["x", "w1"], ["c1"], name="c1", pads=[1, 1, 1, 1]),
             helper.make_node("MaxPool", ["c1"], ["p1"], name="p1", kernel_shape=[2, 2], strides=[2, 2]),
             helper.make_node("Conv", ["p1", "w2"], ["c2"], name="c2", pads=[1, 1, 1, 1]),
             helper.make_node("AveragePool", ["c2"], ["p2"], name="p2", kernel_shape=[2, 2], strides=[2, 2]),
             helper.make_node("Conv", ["p2", "w3"], ["y"], name="c3")]
    graph = helper.make_graph(nodes, "chain", [helper.make_tensor_value_info("x", TensorProto.FLOAT, [1, 3, 32, 32])],
                              [helper.make_tensor_value_info("y", TensorProto.FLOAT, [1, 4, 8, 8])], inits)
    return helper.make_model(graph, opset_imports=[helper.make_opsetid("", 17)])


def test_chain_peak_is_the_largest_input_plus_output_of_one_layer():
    # Source: common practice — in a chain the peak is max over layers of (input bytes + output bytes).
    loaded = prepare_model(_chain_model())
    result = budget.analyze(loaded, make_plan(loaded), budget.BudgetOptions(what_if=False))
    elements = {"x": 3 * 32 * 32, "c1": 8 * 32 * 32, "p1": 8 * 16 * 16, "c2": 16 * 16 * 16,
                "p2": 16 * 8 * 8, "y": 4 * 8 * 8}
    chain = ["x", "c1", "p1", "c2", "p2", "y"]
    expected = max(elements[a] + elements[b] for a, b in zip(chain, chain[1:]))   # int8: 1 B each
    assert result.sram["peak_bytes"] == expected == 3 * 1024 + 8 * 1024
    assert result.order["changed"] is False
    assert_no_overlap(result.arena["plan"])


@pytest.mark.parametrize("name", ["ds_cnn_kws", "conv1d_sensor", "dense_autoencoder"])
def test_zoo_chain_peaks_match_the_zoo_hand_figures(name):
    # Source: tests/zoo.py computes int8_chain_peak_bytes by hand as max(input + output) per layer.
    zm = zoo.ZOO[name]()
    loaded = prepare_model(zm.model)
    result = budget.analyze(loaded, make_plan(loaded), budget.BudgetOptions(what_if=False))
    assert result.sram["peak_bytes"] == zm.int8_chain_peak_bytes


def _onnx_walk_peak(model, order_names: list[str]) -> int:
    """Independent int8 liveness walk over an ONNX graph: 1 B per element; a Conv/Add/Sub output
    whose only consumer is a Relu is not stored (the ReLU is the layer's output clamp), the Relu's
    output is written at the Conv's step instead."""
    g = model.graph
    inits = {i.name for i in g.initializer}
    nodes = {n.name: n for n in g.node}
    shapes = {}
    from onnx import shape_inference
    inferred = shape_inference.infer_shapes(model)
    for vi in list(inferred.graph.value_info) + list(inferred.graph.input) + list(inferred.graph.output):
        shapes[vi.name] = int(np.prod([d.dim_value for d in vi.type.tensor_type.shape.dim]))
    users = {}
    for n in g.node:
        for i in n.input:
            users.setdefault(i, []).append(n.name)
    sizes, producer, readers = {}, {}, {}
    fused_into = {}
    for n in g.node:
        out = n.output[0]
        u = users.get(out, [])
        if n.op_type in ("Conv", "Add", "Sub") and len(u) == 1 and nodes[u[0]].op_type == "Relu":
            fused_into[out] = nodes[u[0]].output[0]
    for inp in g.input:
        sizes[inp.name], producer[inp.name] = shapes[inp.name], None
    for n in g.node:
        for out in n.output:
            if out in fused_into:
                continue
            sizes[out], producer[out] = shapes[out], n.name
    for n in g.node:
        if n.op_type == "Relu" and n.input[0] in fused_into:
            producer[n.output[0]] = [m.name for m in g.node if m.output[0] == n.input[0]][0]
    for t in sizes:
        readers[t] = set(users.get(t, []))
        for f, target in fused_into.items():
            if target == t:
                readers[t] |= set(users.get(f, []))
    position = {name: i for i, name in enumerate(order_names)}
    return walk_peak(sizes, {t: (None if p is None else position[p]) for t, p in producer.items()},
                     {t: {position[r] for r in rs if r in position} for t, rs in readers.items()},
                     {o.name for o in g.output}, list(range(len(order_names))))


@pytest.mark.parametrize("seed", range(8))
def test_order_search_on_random_zoo_dags_equals_brute_force(seed):
    # Source: enumeration of all topological orders with an independent liveness walk.
    zm = zoo.random_dag(seed=seed, n_nodes=7)
    loaded = prepare_model(zm.model)
    plan = make_plan(loaded)
    options = budget.BudgetOptions(views=False, inplace=False, what_if=False, order_time_limit_s=30)
    result = budget.analyze(loaded, plan, options)
    g = loaded.graph
    names = [n.name for n in g.node]
    produced = {o: i for i, n in enumerate(g.node) for o in n.output}
    preds = [{produced[i] for i in n.input if i in produced} for n in g.node]
    best = min(_onnx_walk_peak(loaded.model, [names[v] for v in order]) for order in topological_orders(preds))
    assert result.order["method"] == "exact"
    assert result.order["best_peak_bytes"] == best
    assert result.order["default_peak_bytes"] == _onnx_walk_peak(loaded.model, names)
    assert_no_overlap(result.arena["plan"])
