"""schedule: liveness of activation buffers over an execution order, the order with the lowest peak,
and an arena layout.

Everything here works on a `MemoryProblem`: nodes (by index, with their predecessors) and buffers
(bytes, the node that allocates them, the nodes that read them). What a buffer is — which tensors
share storage, at what stored type — is decided by qfit.budget; this module only counts.

Conventions (docs/memory.md has the full list):
  * step s = running the s-th node of the order;
  * a buffer is live from the step of its allocating node (a graph input: from step 0) through the
    last step that reads it (a graph output: through the last step);
  * the bytes of step s = every buffer live at s, plus the node's step-local extra bytes (scratch).

Order search (memory-aware scheduling; Liberis & Lane 2019, "Neural networks on microcontrollers:
saving memory at inference via operator reordering"; Ahn et al., MLSys 2020, "Ordering Chaos"):
the buffers live after a set S of scheduled nodes depend on S only, so the best peak is a
bottleneck shortest path over the lattice of scheduled sets. We run a best-first (Dijkstra) search
on it — exact when it finishes — bounded by the best of two greedy orders and a beam search, all
under one time limit. The
default order is kept unless another order is strictly better, so chains come out unchanged.
"""
from __future__ import annotations

import heapq
import time
from dataclasses import dataclass, field


@dataclass
class Buffer:
    """One piece of SRAM holding one tensor, or several tensors that share bytes (aliases)."""

    name: str
    size_bytes: int
    producer: int | None          # node index that allocates it; None = graph input (live from step 0)
    readers: frozenset[int]       # node indices that read any tensor stored in it
    is_output: bool = False       # holds a graph output: live through the last step
    members: tuple[str, ...] = () # tensor names stored in it
    dtype: str = ""


@dataclass
class MemoryProblem:
    node_names: list[str]
    preds: list[frozenset[int]]   # node index -> indices of nodes it depends on
    buffers: list[Buffer]
    extra_bytes: list[int] = field(default_factory=list)  # node index -> step-local bytes (scratch...)

    def __post_init__(self):
        if not self.extra_bytes:
            self.extra_bytes = [0] * len(self.node_names)

    @property
    def default_order(self) -> list[int]:
        return list(range(len(self.node_names)))


@dataclass
class Liveness:
    order: list[int]
    first_step: list[int]         # buffer index -> first live step
    last_step: list[int]          # buffer index -> last live step
    step_bytes: list[int]         # step -> live bytes incl. the node's extra bytes
    peak_bytes: int
    peak_step: int

    def live_at(self, step: int) -> list[int]:
        return [b for b, (f, l) in enumerate(zip(self.first_step, self.last_step)) if f <= step <= l]


def is_topological(problem: MemoryProblem, order: list[int]) -> bool:
    seen: set[int] = set()
    for v in order:
        if not problem.preds[v] <= seen:
            return False
        seen.add(v)
    return len(seen) == len(problem.node_names) == len(order)


def liveness(problem: MemoryProblem, order: list[int] | None = None) -> Liveness:
    """First/last live step of every buffer and the bytes of every step, for `order`."""
    order = problem.default_order if order is None else list(order)
    position = {v: s for s, v in enumerate(order)}
    last_step_of_order = max(len(order) - 1, 0)
    first, last = [], []
    for buf in problem.buffers:
        f = 0 if buf.producer is None else position[buf.producer]
        l = max([position[r] for r in buf.readers] + [f])
        if buf.is_output:
            l = last_step_of_order
        first.append(f)
        last.append(l)
    n_steps = max(len(order), 1)
    delta = [0] * (n_steps + 1)
    for buf, f, l in zip(problem.buffers, first, last):
        delta[f] += buf.size_bytes
        delta[l + 1] -= buf.size_bytes
    step_bytes, running = [], 0
    for s in range(n_steps):
        running += delta[s]
        extra = problem.extra_bytes[order[s]] if s < len(order) else 0
        step_bytes.append(running + extra)
    peak = max(step_bytes) if step_bytes else 0
    return Liveness(order, first, last, step_bytes, peak, step_bytes.index(peak) if step_bytes else 0)


def peak_of(problem: MemoryProblem, order: list[int]) -> int:
    return liveness(problem, order).peak_bytes


# ---- order search -------------------------------------------------------------------------------

@dataclass
class OrderResult:
    order: list[int]
    peak_bytes: int
    default_peak_bytes: int
    method: str                   # "exact" (proved optimal) | "heuristic" (time or state limit hit)
    changed: bool
    states_explored: int = 0


class _Search:
    """Bit-mask bookkeeping shared by the greedy orders and the exact search."""

    def __init__(self, problem: MemoryProblem):
        self.problem = problem
        n = len(problem.node_names)
        self.n = n
        self.full = (1 << n) - 1
        self.pred_mask = [sum(1 << p for p in problem.preds[v]) for v in range(n)]
        self.succs: list[list[int]] = [[] for _ in range(n)]
        for v in range(n):
            for p in problem.preds[v]:
                self.succs[p].append(v)
        self.alloc_bytes = [0] * n
        self.touched: list[list[int]] = [[] for _ in range(n)]   # buffers v reads or allocates
        self.reader_mask = []
        self.initial_live = 0
        self.unread_inputs_bytes = 0
        for b, buf in enumerate(problem.buffers):
            mask = sum(1 << r for r in buf.readers)
            self.reader_mask.append(mask)
            if buf.producer is None:
                self.initial_live += buf.size_bytes
                if not buf.readers and not buf.is_output:
                    self.unread_inputs_bytes += buf.size_bytes  # live at step 0 only
            else:
                self.alloc_bytes[buf.producer] += buf.size_bytes
                self.touched[buf.producer].append(b)
            for r in buf.readers:
                if b not in self.touched[r]:
                    self.touched[r].append(b)
        self.sources = [v for v in range(n) if not problem.preds[v]]

    def step(self, done: int, live: int, v: int) -> tuple[int, int]:
        """(bytes during step v, live bytes after it) when v runs after the set `done`."""
        problem = self.problem
        during = live + self.alloc_bytes[v] + problem.extra_bytes[v]
        after_done = done | (1 << v)
        freed = self.unread_inputs_bytes if done == 0 else 0
        for b in self.touched[v]:
            buf = problem.buffers[b]
            if not buf.is_output and not (self.reader_mask[b] & ~after_done):
                freed += buf.size_bytes
        return during, during - problem.extra_bytes[v] - freed

    def ready_after(self, ready: tuple[int, ...], done: int, v: int) -> tuple[int, ...]:
        after_done = done | (1 << v)
        new = [w for w in self.succs[v] if not (self.pred_mask[w] & ~after_done)]
        return tuple(sorted(set(r for r in ready if r != v) | set(new)))

    def greedy(self, key) -> list[int]:
        done, live, order = 0, self.initial_live, []
        ready = tuple(sorted(self.sources))
        while ready:
            best = min(ready, key=lambda v: key(*self.step(done, live, v), v))
            _, live = self.step(done, live, best)
            ready = self.ready_after(ready, done, best)
            done |= 1 << best
            order.append(best)
        return order


def search_order(problem: MemoryProblem, time_limit_s: float = 2.0, max_states: int = 2_000_000) -> OrderResult:
    """The topological order with the lowest peak, or the best found within the limits."""
    n = len(problem.node_names)
    default = problem.default_order
    default_peak = peak_of(problem, default)
    if n <= 1:
        return OrderResult(default, default_peak, default_peak, "exact", False)
    deadline = time.monotonic() + max(0.0, time_limit_s)
    search = _Search(problem)
    best_order, best_peak = default, default_peak
    # Greedy candidates: least bytes during the step, or least bytes left live after it.
    for key in (lambda during, after, v: (during, after, v), lambda during, after, v: (after, during, v)):
        candidate = search.greedy(key)
        peak = peak_of(problem, candidate)
        if peak < best_peak:
            best_order, best_peak = candidate, peak
    candidate = _beam(search, BEAM_WIDTH, deadline)
    if candidate is not None:
        peak = peak_of(problem, candidate)
        if peak < best_peak:
            best_order, best_peak = candidate, peak
    best_order, best_peak, finished, explored = _best_first(search, best_order, best_peak, deadline, max_states)
    if best_peak >= default_peak:
        best_order, best_peak = default, default_peak
    return OrderResult(best_order, best_peak, default_peak, "exact" if finished else "heuristic",
                       best_order != default, explored)


def _best_first(search: "_Search", best_order: list[int], best_peak: int, deadline: float, max_states: int
                ) -> tuple[list[int], int, bool, int]:
    """Best-first search on (peak so far) from the incumbent `best_order`; anything not strictly
    better than the incumbent is pruned. Returns (order, peak, finished, states explored)."""
    start_ready = tuple(sorted(search.sources))
    best_at: dict[int, int] = {0: 0}
    parent: dict[int, tuple[int, int]] = {}
    heap = [(0, 0, 0, 0, search.initial_live, start_ready)]
    counter = 0
    explored = 0
    finished = True
    while heap:
        peak, _neg_depth, _counter, done, live, ready = heapq.heappop(heap)
        if best_at.get(done, 1 << 62) < peak:
            continue
        if done == search.full:
            order, state = [], done
            while state:
                prev, v = parent[state]
                order.append(v)
                state = prev
            best_order, best_peak = order[::-1], peak
            break
        explored += 1
        if explored % 256 == 0 and (time.monotonic() > deadline or len(best_at) > max_states):
            finished = False
            break
        for v in ready:
            during, after = search.step(done, live, v)
            new_peak = max(peak, during)
            if new_peak >= best_peak:
                continue
            nxt = done | (1 << v)
            if best_at.get(nxt, 1 << 62) <= new_peak:
                continue
            best_at[nxt] = new_peak
            parent[nxt] = (done, v)
            counter += 1
            heapq.heappush(heap, (new_peak, -bin(nxt).count("1"), counter, nxt, after,
                                  search.ready_after(ready, done, v)))
    return best_order, best_peak, finished, explored


BEAM_WIDTH = 48
ARENA_IMPROVE_ROUNDS = 16


def _beam(search: _Search, width: int, deadline: float) -> list[int] | None:
    """Beam search level by level (one more node per level), keeping the `width` partial orders
    with the lowest (peak so far, live bytes after); None if the deadline passes first."""
    beam = [(0, search.initial_live, 0, tuple(sorted(search.sources)), ())]
    for _level in range(search.n):
        if time.monotonic() > deadline:
            return None
        seen: dict[int, tuple] = {}
        for peak, live, done, ready, order in beam:
            for v in ready:
                during, after = search.step(done, live, v)
                nxt = done | (1 << v)
                key = (max(peak, during), after)
                if nxt not in seen or key < seen[nxt][:2]:
                    seen[nxt] = (key[0], key[1], nxt, ready, order + (v,), done, v)
        ranked = sorted(seen.values(), key=lambda e: (e[0], e[1], e[4]))[:width]
        beam = [(peak, after, nxt, search.ready_after(ready, done, v), order)
                for peak, after, nxt, ready, order, done, v in ranked]
    return list(beam[0][4]) if beam else None


# ---- arena --------------------------------------------------------------------------------------

@dataclass
class Placement:
    name: str
    offset: int
    size_bytes: int
    first_step: int
    last_step: int


def align_up(n: int, alignment: int) -> int:
    return -(-n // alignment) * alignment if alignment > 1 else n


def plan_arena(items: list[tuple[str, int, int, int]], alignment: int = 4) -> tuple[list[Placement], int]:
    """Offsets for (name, size_bytes, first_step, last_step) so that buffers live at the same step
    never overlap. Greedy by size (Pisarchyk & Lee 2020, "Efficient Memory Management for Deep
    Neural Net Inference"): largest first, each into the smallest gap between the already placed
    buffers it overlaps in time (else on top); also first fit, and the paper's greedy by breadth
    (buffers of the fullest steps first). The smallest arena wins, then buffers that end at its top
    are moved to the front of the placement order while that shrinks it. Returns (placements in input
    order, arena bytes)."""
    best = None
    for order, best_fit in ((_by_size(items), True), (_by_size(items), False), (_by_breadth(items, alignment), True)):
        placements = _place(items, order, alignment, best_fit)
        arena = max((p.offset + p.size_bytes for p in placements), default=0)
        if best is None or arena < best[1]:
            best = (placements, arena, order, best_fit)
    placements, arena, order, best_fit = best
    # Local improvement: a buffer that ends at the top of the arena is placed first instead, and
    # the change is kept when the arena shrinks (each top buffer is tried once).
    tried: set[int] = set()
    for _ in range(ARENA_IMPROVE_ROUNDS):
        top = [i for i in reversed(order) if placements[i].offset + placements[i].size_bytes == arena
               and i not in tried]
        if not top or arena == 0:
            break
        tried.add(top[0])
        candidate = [top[0]] + [i for i in order if i != top[0]]
        new = _place(items, candidate, alignment, best_fit)
        new_arena = max((p.offset + p.size_bytes for p in new), default=0)
        if new_arena < arena:
            placements, arena, order = new, new_arena, candidate
            tried.clear()
    return placements, arena


def _by_size(items) -> list[int]:
    return sorted(range(len(items)), key=lambda i: (-items[i][1], items[i][2], items[i][0]))


def _by_breadth(items, alignment: int) -> list[int]:
    """Greedy by breadth (same paper): steps with the most live bytes first, and within a step its
    buffers largest first — the buffers that meet at the peak get packed together first."""
    steps = max((it[3] for it in items), default=-1) + 1
    breadth = [0] * steps
    for _, size, first, last in items:
        for s in range(first, last + 1):
            breadth[s] += align_up(size, alignment)
    order, taken = [], set()
    for s in sorted(range(steps), key=lambda s: (-breadth[s], s)):
        live = [i for i, it in enumerate(items) if it[2] <= s <= it[3] and i not in taken]
        for i in sorted(live, key=lambda i: (-items[i][1], items[i][2], items[i][0])):
            order.append(i)
            taken.add(i)
    order.extend(i for i in _by_size(items) if i not in taken)
    return order


def _place(items, order: list[int], alignment: int, best_fit: bool) -> list[Placement]:
    placed: list[Placement] = []
    result: dict[int, Placement] = {}
    for i in order:
        name, size, first, last = items[i]
        size = align_up(size, alignment)
        overlapping = sorted((p for p in placed if p.first_step <= last and first <= p.last_step and p.size_bytes),
                             key=lambda p: p.offset)
        chosen, chosen_gap, top = None, None, 0
        for p in overlapping:
            gap = p.offset - top
            if gap >= size and (chosen is None or (best_fit and gap < chosen_gap)):
                chosen, chosen_gap = top, gap
            top = max(top, p.offset + p.size_bytes)
        offset = top if chosen is None else chosen
        placement = Placement(name, offset, size, first, last)
        result[i] = placement
        if size:
            placed.append(placement)
    return [result[i] for i in range(len(items))]
