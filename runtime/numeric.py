"""Looped subtraction-free elimination: steady states of large schemes.

For a continuous-time Markov chain on states 0..n-1 with rates q(i→j) > 0
on the edges of a directed graph, the steady state is found by state
reduction (the Grassmann–Taksar–Heyman algorithm in continuous time [1]_).
Eliminating state k replaces the chain by the chain censored on the other
states:

    d_k = Σ_m q(k→m),        q(i→j) += q(i→k) · q(k→j) / d_k   (i ≠ j),

over the current in-neighbours i and out-neighbours j of k (edges i→i are
dropped: the diagonal is never stored). After every state but the root r has
gone, back-substitution in reverse elimination order gives

    x_r = 1,        x_k = Σ_i x_i · q(i→k) / d_k,

over the in-edges k had when it was eliminated, and p = x / Σ x. Nothing is
subtracted anywhere, so every probability, however small, carries a relative
error of a modest multiple of the unit roundoff independent of the
conditioning of the generator (O'Cinneide [2]_).

The structure of the elimination depends only on the graph and the order, so
:class:`EliminationPlan` computes it once — the fill edges and a flat
instruction tape of int32 slot indices, slots of dead edges recycled for
fill — and then runs the tape on many parameter sets: in a C kernel compiled
on first use (8, 16 or 32 parameter sets side by side in SIMD lanes, rows split
across threads; each set's bits are the same whatever its lane, block width
or thread), or in numpy when no C compiler is available.

References
----------
.. [1] W. K. Grassmann, M. I. Taksar, D. P. Heyman, "Regenerative analysis and
   steady state distributions for Markov chains", Oper. Res. 33 (1985)
   1107–1116.
.. [2] C. A. O'Cinneide, "Entrywise perturbation theory and error analysis for
   Markov chains", Numer. Math. 65 (1993) 109–120.
.. [3] H. M. Markowitz, "The elimination form of the inverse and its
   application to linear programming", Management Sci. 3 (1957) 255–269.
"""

from __future__ import annotations

import ctypes
import heapq
from array import array
import os
import threading
from pathlib import Path

import numpy as np

from .errors import EvaluationError
from .graph import terminal_components
from .cache import NATIVE_FLAGS
from .kernel import NATIVE_TAPE, native_pool, run_native, run_ranges, usable_cores
from .progress import progress

LANES = 8                      # parameter sets per vector (one AVX-512 register of doubles)
_CORES = usable_cores()         # threads a call may use by default
# Graphs up to this size get RESTARTS more greedy passes, ties broken by
# seeded shuffles instead of the state index; the fewest flops wins (see
# elimination_order). By size, not by time, so every machine picks the same
# order. They cost about 9 passes: random 1,000 states 0.14 -> 1.0 s.
RESTARTS = 8
RESTART_STATES = 2_000
RESTART_EDGES = 20_000
RESTART_FLOPS = 20_000_000
SCORE_CAP = 1024               # above in-degree × out-degree, the fill score is that bound (measured:
                               # 100×100 lattice orders in 2 s at 1024 vs 6 s at 4096, 7% more flops)
# Split rows across threads only when each thread gets at least this much work,
# counted as rows × flops. Measured in benches/bench_numeric.py (Q4, 646 flops):
# 512 rows took 57 µs on one thread and 73 µs on two; 4,096 rows 434 µs on one
# and 321 µs on two — the break-even lies near 10^6 flops per thread.
MIN_WORK_PER_THREAD = 1_000_000
# On the native pool (runtime/thread_pool.c: spinning workers, the caller
# claims what no worker took) the break-even drops to about 20,000 flops per
# thread (Q4: 64 sets took 18.4 us on one thread and 17.6 us on two; 128 sets
# 23.8 and 21.1 us; Q6, 16 sets: 31.6 and 24.1 us; measured here).
MIN_WORK_PER_THREAD_POOLED = 50_000
GROUP_BYTES = 32 << 10          # slot bytes of a block up to which wider blocks are used
TINY = 2.0 ** -960             # below this a scaled or censored rate may have lost digits to underflow
BIG = np.finfo(np.float64).max
_KERNEL_FLAGS = ("-O3", *NATIVE_FLAGS, "-fno-math-errno", "-ffp-contract=fast")

# ---------------------------------------------------------------- structure


def _check_graph(n, edges):
    """Validated (n, src, dst) with src/dst int arrays; one-line errors."""
    try:
        n = int(n)
    except (TypeError, ValueError):
        raise EvaluationError(f"number of states must be an integer, got {n!r}") from None
    if n < 1:
        raise EvaluationError(f"a scheme needs at least one state, got n = {n}")
    try:
        arr = np.asarray(edges, dtype=np.int64).reshape(-1, 2) if len(edges) else np.zeros((0, 2), np.int64)
    except (TypeError, ValueError):
        raise EvaluationError("edges must be a sequence of (source, target) integer pairs") from None
    if arr.ndim != 2 or arr.shape[1] != 2 or (len(edges) and arr.shape[0] != len(edges)):
        raise EvaluationError("edges must be a sequence of (source, target) integer pairs")
    bad = np.flatnonzero((arr < 0).any(axis=1) | (arr >= n).any(axis=1))
    if bad.size:
        e = int(bad[0])
        raise EvaluationError(f"edge {e} {tuple(arr[e].tolist())} names a state outside 0..{n - 1}")
    loops = np.flatnonzero(arr[:, 0] == arr[:, 1])
    if loops.size:
        e = int(loops[0])
        raise EvaluationError(f"edge {e} is a self-loop on state {int(arr[e, 0])}")
    key = arr[:, 0] * n + arr[:, 1]
    uniq, first = np.unique(key, return_index=True)
    if uniq.size != key.size:
        dup = np.setdiff1d(np.arange(key.size), first)[0]
        raise EvaluationError(f"edge {int(dup)} {tuple(arr[dup].tolist())} is a duplicate")
    return n, arr[:, 0].tolist(), arr[:, 1].tolist()


def _terminal_states(n, out_adj):
    """States of the unique terminal strong component; refuses several."""
    edges = [(v, w) for v in range(n) for w in out_adj[v]]
    terminal = terminal_components(n, edges)
    if len(terminal) != 1:
        shown = "; ".join("{" + ", ".join(map(str, comp[:6])) + (", ..." if len(comp) > 6 else "") + "}"
                          for comp in terminal[:4])
        raise EvaluationError(f"the scheme has {len(terminal)} terminal components ({shown}), "
                              "so its steady state is not unique")
    return set(terminal[0])


def _adjacency(n, src, dst):
    out_adj = [set() for _ in range(n)]
    in_adj = [set() for _ in range(n)]
    for i, j in zip(src, dst):
        out_adj[i].add(j)
        in_adj[j].add(i)
    return out_adj, in_adj


def elimination_order(n, edges, *, root=None) -> list[int]:
    """Greedy fill-reducing elimination order for subtraction-free state reduction.

    Parameters
    ----------
    n : int
        Number of states.
    edges : sequence of (int, int)
        Directed edges (source, target); no self-loops or duplicates.
    root : int, optional
        The state to keep (never eliminated). By default the greedy choice
        decides, restricted to the terminal strong component.

    Returns
    -------
    list of int
        A permutation of ``range(n)``; the last entry is the root.

    Notes
    -----
    Eliminating k joins every in-neighbour i to every out-neighbour j; its
    *fill* is the number of such pairs with i ≠ j and no edge i→j yet. Each
    step eliminates the state of least fill, ties broken by least degree
    (in + out), then least index: a Markowitz-style greedy [3]_ on the
    directed structure. Scores live in a heap with lazy deletion; a popped
    score is re-checked before it is used. Only the neighbours of the
    eliminated state are rescored eagerly (other states can only lose fill),
    and a state whose in-degree × out-degree exceeds ``SCORE_CAP`` is scored
    by that product, an upper bound of its fill — an approximate variant
    that keeps 10,000-state lattices to seconds. On graphs of at most
    ``RESTART_STATES`` states and ``RESTART_EDGES`` edges whose first pass
    costs at most ``RESTART_FLOPS``, ``RESTARTS`` more passes break the ties
    by seeded shuffles of the states instead of their index, and the pass
    with the fewest flops wins (the first on ties; a pass stops as soon as it
    cannot win). Measured here: random 200 states and 600 edges 51,879 →
    49,697 flops (looped kernel 4.53 → 4.26 µs per set), random 1,000 states
    5.66 → 5.10 million (553 → 470 µs); hypercubes keep the index order. The
    rule depends on sizes only, so the order is deterministic: the same on
    every machine and every run.

    Every state must reach the root: the scheme needs exactly one terminal
    strong component, which contains the root; otherwise ``EvaluationError``.

    Examples
    --------
    >>> elimination_order(3, [(0, 1), (1, 0), (1, 2), (2, 1)])
    [0, 1, 2]
    """
    return elimination_cost(n, edges, root=root).order


class EliminationCost:
    """The size of subtraction-free elimination under the greedy order, counted
    while the order is chosen (no tape is built): see :func:`elimination_cost`.

    Attributes
    ----------
    order : list of int or None
        The elimination order (as :func:`elimination_order`); None when the
        count stopped at the budget.
    flops : int
        Additions, multiplications and divisions per parameter set, exactly as
        :class:`EliminationPlan` counts them; a lower bound when not ``complete``.
    fill : int
        Edges created by the elimination (lower bound when not complete).
    updates : int
        Updates V[i→j] += q(i→k)·q(k→j)/d_k of the tape (lower bound when not complete).
    complete : bool
        False when counting stopped because ``flops`` passed the budget.
    """

    __slots__ = ("order", "flops", "fill", "updates", "complete", "n", "m")

    def __init__(self, order, flops, fill, updates, complete, n, m):
        self.order, self.flops, self.fill, self.updates = order, flops, fill, updates
        self.complete, self.n, self.m = complete, n, m

    @property
    def tape_bytes(self) -> int:
        """Memory the looped numeric path's tape takes (lower bound when not complete):
        4 bytes per update target plus 4 per grid entry while it is built, and
        index arrays of 4–8 bytes per slot and pivot."""
        return 8 * self.updates + 24 * (self.m + self.fill) + 40 * self.n


def elimination_cost(n, edges, *, root=None, budget=None, terminal=None) -> EliminationCost:
    """Flops, fill and tape size of elimination under the greedy order, in one pass.

    The counts are taken while :func:`elimination_order` chooses the order
    (same order, same numbers as :class:`EliminationPlan`), so no tape is
    built. With ``budget`` (flops) the count stops as soon as it passes the
    budget: ``complete`` is then False and the numbers are lower bounds.
    The greedy ordering does set work proportional to the fill it creates,
    so a budget also bounds its time on graphs whose fill explodes.
    ``terminal``: the states of the unique terminal strong component, when the
    caller has them already (saves recomputing the components).
    """
    n, src, dst = _check_graph(n, edges)
    best = _greedy(n, src, dst, root, budget, terminal)
    if best.complete and n <= RESTART_STATES and len(src) <= RESTART_EDGES and best.flops <= RESTART_FLOPS:
        for seed in range(1, RESTARTS + 1):
            tie = np.random.default_rng(seed).permutation(n).tolist()
            other = _greedy(n, src, dst, root, best.flops - 1, terminal, tie)
            if other.complete and other.flops < best.flops:
                best = other
    return best


def _greedy(n, src, dst, root, budget, terminal=None, tie=None) -> EliminationCost:
    out_adj, in_adj = _adjacency(n, src, dst)
    allowed = set(terminal) if terminal is not None else _terminal_states(n, out_adj)
    if root is not None:
        root = int(root)
        if not 0 <= root < n:
            raise EvaluationError(f"root {root} is outside 0..{n - 1}")
        if root not in allowed:
            raise EvaluationError(f"root {root} cannot be reached from every state")
    alive = [True] * n
    remaining_allowed = len(allowed)

    def score(v):
        o, ins = out_adj[v], in_adj[v]
        lo, li = len(o), len(ins)
        if lo * li > SCORE_CAP:
            return lo * li
        f = 0
        for i in ins:
            f += lo - len(o & out_adj[i]) - (i in o)
        return f

    tie = tie if tie is not None else range(n)
    key = [None] * n
    heap = []
    for v in range(n):
        if v != root:
            key[v] = (score(v), len(out_adj[v]) + len(in_adj[v]), tie[v], v)
            heap.append(key[v])
    heapq.heapify(heap)
    order = []
    kept = root
    # counts as in _symbolic: per pivot (o outs, i ins) o-1 adds, o muls, 1 div for
    # the scaled exits; o - [i in outs] muls and as many adds less the fresh edges per
    # in-neighbour; i muls, i-1 adds, 1 div for back-substitution.
    flops = fill = updates = 0
    limit = budget if budget is not None else float("inf")
    with progress("elimination order", total=n, unit="state") as bar:
        while heap:
            item = heapq.heappop(heap)
            v = item[3]
            if not alive[v] or item != key[v]:
                continue
            fresh = (score(v), len(out_adj[v]) + len(in_adj[v]), tie[v], v)
            if fresh != item:
                key[v] = fresh
                heapq.heappush(heap, fresh)
                continue
            if root is None and v in allowed and remaining_allowed == 1:
                kept = v               # the last state of the terminal component stays
                alive[v] = False
                continue
            # eliminate v
            alive[v] = False
            order.append(v)
            if not len(order) & 255:
                bar.update(256)
            if v in allowed:
                remaining_allowed -= 1
            ins, outs = in_adj[v], out_adj[v]
            lo, li = len(outs), len(ins)
            flops += 2 * lo + 2 * li + (li == 0)
            for i in ins:
                out_adj[i].discard(v)
            for j in outs:
                in_adj[j].discard(v)
            for i in ins:
                oi = out_adj[i]
                pairs = lo - (i in outs)
                new = outs - oi
                new.discard(i)
                updates += pairs
                fill += len(new)
                flops += 2 * pairs - len(new)
                if new:
                    oi |= new
                    for j in new:
                        in_adj[j].add(i)
            touched = ins | outs
            in_adj[v] = set()
            out_adj[v] = set()
            if flops > limit:
                return EliminationCost(None, flops, fill, updates, False, n, len(src))
            for u in touched:
                if u != kept and alive[u]:
                    key[u] = (score(u), len(out_adj[u]) + len(in_adj[u]), tie[u], u)
                    heapq.heappush(heap, key[u])
    order.append(kept)
    flops += 2 * n                              # Σ x (n-1 adds), 1 div, n muls
    return EliminationCost(order, flops, fill, updates, True, n, len(src))


def _symbolic(n, src, dst, order):
    """Replay the elimination on physical slots; returns the tape, the number
    of slots, the fill and the flops.

    Slots 0..m-1 hold the scheme's edges in input order. An edge dies when one
    of its states is eliminated (the kernel zeroes its slot as it reads it),
    and its slot goes to a stack of free slots; a fill edge takes the most
    recently freed slot, or a new one. So the slots a block touches are about
    as many as the edges alive at once, not all edges ever made.

    Tape arrays (int32 indices, int64 pointers), per pivot p eliminating
    ``piv_state[p]``: its out-edge slots ``out_slot[out_ptr[p]:out_ptr[p+1]]``
    (targets j in increasing order), its in-edge slots, sources and skip
    columns ``in_slot``, ``in_src``, ``in_skip`` over ``in_ptr`` (sources i in
    increasing order; ``in_skip`` is the column of j == i among the outs, or
    the number of outs), and the update targets ``upd``: for each in-edge in
    turn, the slot of edge i→j for every out-edge j ≠ i (the update
    V[i→j] += q(i→k)·q(k→j)/d_k). ``upd_ptr[p]`` is where pivot p's targets start.
    """
    m = len(src)
    out_map = [dict() for _ in range(n)]
    in_map = [dict() for _ in range(n)]
    for e, (i, j) in enumerate(zip(src, dst)):
        out_map[i][j] = e
        in_map[j][i] = e
    n_phys, fill = m, 0
    free = []                                    # slots of dead edges, reused last-freed first
    out_ptr, in_ptr, upd_ptr = [0], [0], [0]
    out_slot, in_slot, in_src, in_skip = array("i"), array("i"), array("i"), array("i")
    grid = array("i")                            # 4 bytes an entry: big grids stay small
    adds = muls = divs = 0
    for k in order[:-1]:
        outs = sorted(out_map[k].items())
        ins = sorted(in_map[k].items())
        o_states = [j for j, _ in outs]
        column = {j: c for c, j in enumerate(o_states)}
        out_slot.extend(s for _, s in outs)
        in_slot.extend(s for _, s in ins)
        in_src.extend(i for i, _ in ins)
        in_skip.extend(column.get(i, len(o_states)) for i, _ in ins)
        for i, s in ins:
            del out_map[i][k]
            free.append(s)
        for j, s in outs:
            del in_map[j][k]
            free.append(s)
        adds += len(outs) - 1
        divs += 1
        muls += len(outs)                       # t_j = q(k→j) / d_k
        o_set = set(o_states)
        for i, _ in ins:
            oi = out_map[i]
            fresh = o_set.difference(oi)
            fresh.discard(i)
            for j in sorted(fresh):
                if free:
                    s = free.pop()
                else:
                    s, n_phys = n_phys, n_phys + 1
                oi[j] = s
                in_map[j][i] = s
            fill += len(fresh)
            get = oi.get
            grid.extend([get(j, -1) for j in o_states])   # i itself is never in oi: -1
            pairs = len(o_states) - (i in o_set)
            muls += pairs
            adds += pairs - len(fresh)
        upd_ptr.append(upd_ptr[-1] + len(ins) * len(outs) - sum(i in o_set for i, _ in ins))
        # back-substitution for k: len(ins) products, their sum, one division
        muls += len(ins)
        adds += max(len(ins) - 1, 0)
        divs += 1
        out_map[k] = {}
        in_map[k] = {}
        out_ptr.append(len(out_slot))
        in_ptr.append(len(in_slot))
    adds += n - 1                               # Σ x
    divs += 1
    muls += n                                   # p = x · (1/Σ x)
    grid = np.frombuffer(grid, dtype=np.int32)
    tape = {
        "piv_state": np.asarray(order[:-1], dtype=np.int32),
        "out_ptr": np.asarray(out_ptr, dtype=np.int64),
        "out_slot": np.frombuffer(out_slot, dtype=np.int32),
        "in_ptr": np.asarray(in_ptr, dtype=np.int64),
        "in_slot": np.frombuffer(in_slot, dtype=np.int32),
        "in_src": np.frombuffer(in_src, dtype=np.int32),
        "in_skip": np.frombuffer(in_skip, dtype=np.int32),
        "upd_ptr": np.asarray(upd_ptr, dtype=np.int64),
        "upd": np.ascontiguousarray(grid[grid >= 0]),
    }
    return tape, n_phys, fill, adds + muls + divs


# ------------------------------------------------------------------- kernel

TAPE_VERSION = 2               # the tape layout gth_kernel.c reads (GTH_TAPE_VERSION there)
_TAPE_ARRAYS = ("piv_state", "out_ptr", "out_slot", "in_ptr", "in_slot", "in_src", "in_skip", "upd")


class _Tape(ctypes.Structure):
    _fields_ = [(name, ctypes.c_int64) for name in
                ("version", "n", "m", "n_phys", "n_piv", "root", "n_in", "max_out")] + [
        (name, ctypes.c_void_p) for name in _TAPE_ARRAYS]


_LIBS: dict = {}
_LIB_LOCK = threading.Lock()


def kernel_source() -> str:
    """The C source of the tape kernel (shipped beside this module)."""
    return Path(__file__).with_name("gth_kernel.c").read_text()


def _library():
    """The compiled kernel's entry point, or None when no C compiler works
    (or the library found speaks another tape version)."""
    cc = os.environ.get("CC", "cc")
    with _LIB_LOCK:
        if cc not in _LIBS:
            from .cache import CompileError, shared_library
            try:
                path = shared_library(kernel_source(), flags=_KERNEL_FLAGS, name=f"gth_kernel_v{TAPE_VERSION}")
                lib = ctypes.CDLL(str(path))
                lib.gth_version.restype = ctypes.c_int64
                fn = lib.gth_solve if lib.gth_version() == TAPE_VERSION else None
            except (CompileError, OSError, AttributeError):
                fn = None
            if fn is not None:
                fn.restype = ctypes.c_int64
                fn.argtypes = [ctypes.POINTER(_Tape), ctypes.c_void_p, ctypes.c_void_p,
                               ctypes.c_int64, ctypes.c_int64, ctypes.c_int64, ctypes.c_void_p]
            _LIBS[cc] = fn
        return _LIBS[cc]


# --------------------------------------------------------------------- plan

class EliminationPlan:
    """Subtraction-free steady-state solver for one graph, many rate sets.

    Parameters
    ----------
    n : int
        Number of states.
    edges : sequence of (int, int)
        Directed edges; column e of the rates is the rate of ``edges[e]``.
    order : sequence of int, optional
        Elimination order, a permutation of ``range(n)`` whose last entry is
        the kept root; default :func:`elimination_order`.
    backend : {"c", "numpy"}, optional
        Force a kernel; by default the C kernel, compiled on first use, or
        numpy if no C compiler works.

    Attributes
    ----------
    order : list of int
    fill : int
        Edges the elimination creates that the scheme did not have.
    flops : int
        Additions, multiplications and divisions per parameter set
        (forward elimination, back-substitution and normalisation).
    backend : str
        ``"c"`` or ``"numpy"``.
    n_slots : int
        Value slots a block of the C kernel works in (edges alive at once:
        slots of dead edges are reused for fill).
    groups : int
        Vectors of ``LANES`` sets per block the C kernel prefers (1, 2 or 4);
        fewer when a call has few sets. A set's bits never depend on it.

    Notes
    -----
    State reduction of Grassmann, Taksar & Heyman [1]_ in continuous time
    (see the module docstring); entrywise relative accuracy follows from the
    absence of subtraction [2]_. Each set's rates are scaled by a power of two
    (its largest near 2**1019/m). Back-substitution runs in plain doubles; a
    set whose sums or ratios x_k = ρ_k/ρ_root leave [2**-960, DBL_MAX] (or
    whose total passes 2**1000) is redone, in the C kernel, with a binary
    exponent carried per value (the numpy kernel always carries it), so no
    ratio underflows or overflows before the final normalisation. A set whose float64 intermediates fall near the
    bottom of the normal range (rates spread over many hundreds of orders of
    magnitude) is flagged by the kernel and recomputed by
    :func:`exact_steady_state`.
    """

    def __init__(self, n, edges, *, order=None, backend=None):
        n, src, dst = _check_graph(n, edges)
        if order is None:
            order = elimination_order(n, edges)
        else:
            order = [int(v) for v in order]
            if sorted(order) != list(range(n)):
                raise EvaluationError(f"order must be a permutation of 0..{n - 1}")
            out_adj, _ = _adjacency(n, src, dst)
            if order[-1] not in _terminal_states(n, out_adj):
                raise EvaluationError(f"root {order[-1]} (last in order) cannot be reached from every state")
        self.n, self.m = n, len(src)
        self.edges = list(zip(src, dst))
        self.order = order
        self._tape, self.n_slots, self.fill, self.flops = _symbolic(n, src, dst, order)
        t = self._tape
        self.max_grid = int(max((np.diff(t["in_ptr"]) * np.diff(t["out_ptr"])).max(initial=0), 1))
        self.max_out = int(max(np.diff(t["out_ptr"]).max(initial=0), 1))
        if backend not in (None, "c", "numpy"):
            raise EvaluationError(f"backend must be 'c' or 'numpy', got {backend!r}")
        self._requested = backend
        self.groups = self._preferred_groups()
        self._fn = None
        self._struct = None

    @property
    def backend(self) -> str:
        """``"c"`` when the compiled kernel is (or will be) used, else ``"numpy"``."""
        self._prepare()
        return "c" if self._fn is not None else "numpy"

    def _preferred_groups(self):
        """Vectors of LANES sets per block: the most (4, 2 or 1) whose slots
        stay within ``GROUP_BYTES``, about the first-level data cache. Measured
        here (ns per set, 1 thread, groups 1 / 2 / 4): Q4 142 / 125 / 119,
        Q5 434 / 383 / 389, Q6 1,580 / 1,736 / 1,852; random 1,000 states
        535 / 864 (groups 1 / 2). Bits do not depend on it."""
        g = 4
        while g > 1 and LANES * 8 * g * self.n_slots > GROUP_BYTES:
            g //= 2
        return g

    def _prepare(self):
        if self._struct is not None or self._requested == "numpy":
            return
        fn = _library()
        if fn is None:
            if self._requested == "c":
                raise EvaluationError("backend 'c' requested but no working C compiler was found")
            self._requested = "numpy"
            return
        t = self._tape
        self._struct = _Tape(TAPE_VERSION, self.n, self.m, self.n_slots, self.n - 1, self.order[-1],
                             t["in_slot"].size, self.max_out, *(t[k].ctypes.data for k in _TAPE_ARRAYS))
        self._fn = fn

    # ------------------------------------------------------------ evaluation
    def steady_state(self, rates, *, out=None, threads=None) -> np.ndarray:
        """Steady-state probabilities for each row of rates.

        Parameters
        ----------
        rates : array_like, shape (N, m)
            Positive finite rates; column e belongs to ``edges[e]``.
        out : ndarray, shape (N, n), optional
            C-contiguous float64 buffer to write into (reuse it in loops).
        threads : int, optional
            Upper bound on threads (default: the cores this process may use); rows are
            split only when each thread gets enough work.

        Returns
        -------
        ndarray, shape (N, n)
        """
        try:
            rates = np.ascontiguousarray(rates, dtype=np.float64)
        except (TypeError, ValueError):
            raise EvaluationError("rates must be a numeric (N, m) array") from None
        if rates.ndim != 2 or rates.shape[1] != self.m:
            raise EvaluationError(f"rates must have shape (N, {self.m}), got {rates.shape}")
        N = rates.shape[0]
        if out is None:
            out = np.empty((N, self.n))
        elif (not isinstance(out, np.ndarray) or out.shape != (N, self.n) or out.dtype != np.float64
              or not out.flags.c_contiguous):
            raise EvaluationError(f"out must be a C-contiguous float64 array of shape {(N, self.n)}")
        if N == 0:
            return out
        self._prepare()
        if self._fn is not None:
            self._run_c(rates, out, threads)
        else:
            self._run_numpy(rates, out)
        flagged = np.flatnonzero(np.isnan(out[:, self.order[-1]]))
        for r in flagged:                      # underflow in float64: extended range
            out[r] = exact_steady_state(self.n, self.edges, rates[r], self.order)
        return out

    def _raise(self, kind, row, what, rates):
        if kind == 1:
            i, j = self.edges[what]
            raise EvaluationError(f"row {row}: rate of edge {what} ({i}->{j}) must be positive and "
                                  f"finite, got {rates[row, what]!r}")
        raise EvaluationError(f"row {row}: out of memory for the elimination workspace")

    def threads_for(self, N: int, threads: int | None = None) -> int:
        """Threads a call on ``N`` sets runs on (``threads``: an upper bound,
        default every core): one per core that gets a vector of sets, a block
        and :data:`MIN_WORK_PER_THREAD` flops."""
        return self._split(N, threads)[0]

    def _split(self, N: int, threads: int | None) -> tuple[int, int]:
        """(threads, vectors per block) of a call on ``N`` sets."""
        limit = threads or _CORES
        least = MIN_WORK_PER_THREAD_POOLED if native_pool() is not None else MIN_WORK_PER_THREAD
        count = int(max(1, min(limit, -(-N // LANES), N * self.flops // least)))
        groups = self._groups(-(-N // count))
        return min(count, -(-N // (LANES * groups))), groups

    def _run_c(self, rates, out, threads):
        N = rates.shape[0]
        count, groups = self._split(N, threads)
        width = LANES * groups
        blocks = -(-N // width)
        cuts = [min(N, width * (blocks * c // count)) for c in range(count + 1)]
        tape = ctypes.byref(self._struct)
        rp, op = rates.ctypes.data, out.ctypes.data
        errs = np.zeros((count, 3), dtype=np.int64)
        native = None
        if count > 1:
            native = run_native(NATIVE_TAPE, [ctypes.cast(self._fn, ctypes.c_void_p).value,
                                              ctypes.addressof(self._struct), rp, op, groups,
                                              errs.ctypes.data], cuts)
        if native is None:
            where = {a: i for i, a in enumerate(cuts[:-1])}
            native = run_ranges(lambda a, b: self._fn(tape, rp, op, a, b, groups,
                                                      errs[where[a]].ctypes.data), cuts)
        bad = [tuple(errs[i]) for i, status in enumerate(native) if status]
        if bad:
            kind, row, what = min(bad, key=lambda r: r[1])
            self._raise(int(kind), int(row), int(what), rates)

    def _groups(self, per_thread):
        """Vectors of LANES sets per block for a thread given ``per_thread``
        sets: the plan's preference (:attr:`groups`), fewer when the thread
        has too few sets to fill the lanes. Bits do not depend on it."""
        g = self.groups
        while g > 1 and LANES * g > per_thread:
            g //= 2
        return g

    def _run_numpy(self, rates, out):
        ok = (rates > 0) & (rates <= np.finfo(np.float64).max)
        if not ok.all():
            row, e = np.argwhere(~ok)[0]
            self._raise(1, int(row), int(e), rates)
        N = rates.shape[0]
        chunk = max(1, (1 << 22) // (2 * self.max_grid + self.n_slots + self._tape["in_slot"].size))
        for a in range(0, N, chunk):
            b = min(N, a + chunk)
            out[a:b] = self._numpy_block(rates[a:b])

    def _numpy_block(self, rates):
        """The tape on a block of rows in numpy, as the C kernel does it (see
        gth_kernel.c): power-of-two scaling, dead slots zeroed for reuse,
        underflow flags, exponents carried through back-substitution.
        Flagged rows come back NaN."""
        t = self._tape
        n, m, N = self.n, self.m, rates.shape[0]
        V = np.zeros((self.n_slots, N))
        V[:m] = rates.T
        V[:m] *= np.ldexp(1.0, 1019 - _log2_ceil(m) - np.frexp(V[:m].max(axis=0))[1] + 1)
        ok = np.ones(N, dtype=bool)
        D = np.empty((n - 1, N))
        Q = np.empty((t["in_slot"].size, N))
        op, ip, up = t["out_ptr"], t["in_ptr"], t["upd_ptr"]
        for p in range(n - 1):
            oo = t["out_slot"][op[p]:op[p + 1]]
            vo = V[oo]
            ok &= (vo >= TINY).all(axis=0)
            d = vo.sum(axis=0)
            ok &= d <= BIG
            D[p] = d
            with np.errstate(all="ignore"):
                w = vo * (1.0 / d)
            ok &= (w >= np.finfo(np.float64).tiny).all(axis=0)
            V[oo] = 0.0
            a, b = ip[p], ip[p + 1]
            ii = t["in_slot"][a:b]
            q = Q[a:b] = V[ii]
            ok &= (q >= TINY).all(axis=0)
            V[ii] = 0.0
            if up[p + 1] > up[p]:
                keep = np.ones((b - a, oo.size), dtype=bool)
                rows = np.flatnonzero(t["in_skip"][a:b] < oo.size)
                keep[rows, t["in_skip"][a:b][rows]] = False
                V[t["upd"][up[p]:up[p + 1]]] += (q[:, None, :] * w[None, :, :])[keep]
        XM = np.zeros((n, N))
        XE = np.full((n, N), -(1 << 40), dtype=np.int64)
        root = self.order[-1]
        XM[root], XE[root] = 1.0, 0
        for p in range(n - 2, -1, -1):
            k = int(t["piv_state"][p])
            a, b = ip[p], ip[p + 1]
            if a == b:
                continue
            src = t["in_src"][a:b]
            term, e = np.frexp(XM[src] * Q[a:b])
            g = XE[src] + e
            top = g.max(axis=0)
            acc = np.ldexp(term, np.maximum(g - top, -4000)).sum(axis=0)
            with np.errstate(all="ignore"):
                mant, e = np.frexp(acc / D[p])
            XM[k], XE[k] = mant, top + e
        top = XE.max(axis=0)
        shift = np.maximum(XE - top, -4000)
        with np.errstate(all="ignore"):
            P = np.ldexp(XM * (1.0 / np.ldexp(XM, shift).sum(axis=0)), shift)
        P[:, ~ok] = np.nan
        return P.T


def _log2_ceil(m: int) -> int:
    return max(int(m) - 1, 0).bit_length()


def exact_steady_state(n, edges, rates, order=None) -> np.ndarray:
    """Steady state of one rate vector by the same subtraction-free
    elimination in 40-digit decimal arithmetic with an unbounded exponent
    range: the path of last resort for sets whose float64 intermediates
    underflow. Each result is correctly rounded from a value with a relative
    error far below 1e-30 (nothing is subtracted)."""
    from decimal import Context

    ctx = Context(prec=40, Emin=-10**9, Emax=10**9)
    n, src, dst = _check_graph(n, edges)
    out = [dict() for _ in range(n)]
    inn = [dict() for _ in range(n)]
    for i, j, r in zip(src, dst, rates):
        v = ctx.create_decimal_from_float(float(r))
        out[i][j] = v
        inn[j][i] = v
    if order is None:
        order = elimination_order(n, list(zip(src, dst)))
    saved = []
    for k in order[:-1]:
        d = ctx.create_decimal(0)
        for v in out[k].values():
            d = ctx.add(d, v)
        if not d > 0:
            raise EvaluationError(f"the exit rate of state {k} vanished: the rates leave the scheme "
                                  "without a unique steady state")
        w = {j: ctx.divide(v, d) for j, v in out[k].items()}
        ins = dict(inn[k])
        for i, qik in ins.items():
            del out[i][k]
            for j, wj in w.items():
                if j != i:
                    add = ctx.multiply(qik, wj)
                    out[i][j] = ctx.add(out[i][j], add) if j in out[i] else add
                    inn[j][i] = out[i][j]
        for j in w:
            del inn[j][k]
        out[k], inn[k] = {}, {}
        saved.append((k, ins, d))
    x = [ctx.create_decimal(0)] * n
    x[order[-1]] = ctx.create_decimal(1)
    for k, ins, d in reversed(saved):
        acc = ctx.create_decimal(0)
        for i, q in ins.items():
            acc = ctx.add(acc, ctx.multiply(x[i], q))
        x[k] = ctx.divide(acc, d)
    total = ctx.create_decimal(0)
    for v in x:
        total = ctx.add(total, v)
    return np.array([float(ctx.divide(v, total)) for v in x])
