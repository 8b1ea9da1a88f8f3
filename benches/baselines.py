"""Baselines the benchmarks measure treeflux against, built in the same run.

Every baseline computes the steady state p (Σp = 1, L p = 0) of the master
equation dp/dt = L p, L[j, i] = q(i→j), L[i, i] = −Σ_k q(i→k), for a batch of
parameter sets, the way a user without treeflux would:

- :func:`dense_solve` — numpy's batched dense solve of the stacked (N, n, n)
  Laplacians with the first row replaced by ones (assembly included);
- :func:`sympy_route` — the Matrix-Tree closed form derived in SymPy (each
  ρ_i a principal minor of −L, expanded into its sum over spanning trees),
  ``sympy.cse`` and ``sympy.lambdify(..., "numpy", cse=True)``;
- :class:`NumbaElimination` — a hand-written, Numba-jitted subtraction-free
  elimination (Grassmann, Taksar & Heyman, Oper. Res. 33 (1985) 1107–1116)
  over a precomputed fill pattern and elimination order, eight parameter sets
  side by side in SIMD lanes (structure-of-arrays blocks), blocks split over
  threads with ``numba.prange``.

Also here: the scheme generators the benches share, a high-precision
reference solve with mpmath, and a measured memory bandwidth (the floor that
bytes in + out per parameter set put under any kernel).
"""

from __future__ import annotations

import math
import time

import numpy as np

from treeflux.compiler import Scheme

# ------------------------------------------------------------------ schemes


def hypercube_edges(d: int):
    """The d-cube as a symmetric digraph: 2^d states, an edge per bit flip."""
    n = 2 ** d
    return n, [(i, i ^ (1 << b)) for i in range(n) for b in range(d)]


def random_edges(n: int, m: int, seed: int):
    """A random strongly connected digraph: a random Hamiltonian cycle plus
    random chords up to ``m`` edges (no duplicates, no self-loops)."""
    rng = np.random.default_rng(seed)
    perm = rng.permutation(n)
    edges = {(int(perm[i]), int(perm[(i + 1) % n])) for i in range(n)}
    while len(edges) < m:
        i, j = rng.integers(n, size=2)
        if i != j:
            edges.add((int(i), int(j)))
    return n, sorted(edges)


def edge_scheme(name: str, n: int, edges) -> Scheme:
    """A scheme with states ``s0..s{n-1}`` and an independent rate symbol
    ``k{i}_{j}`` on every edge i→j."""
    s = Scheme(name=name)
    for i in range(n):
        s.add_state(f"s{i}")
    for i, j in edges:
        s.add_edge(f"s{i}", f"s{j}", f"k{i}_{j}")
    return s


def layout(model, n: int, edges):
    """Edges in the compiled model's state order and the input column of each
    edge's rate symbol: ``(edges, cols)`` for the baselines."""
    pos = {name: k for k, name in enumerate(model.states)}
    col = {name: k for k, name in enumerate(model.symbols)}
    mapped = [(pos[f"s{i}"], pos[f"s{j}"]) for i, j in edges]
    cols = np.array([col[f"k{i}_{j}"] for i, j in edges], dtype=np.int64)
    return mapped, cols


def log_uniform(rows: int, cols: int, *, lo: float = 1e-3, hi: float = 1e3, seed: int = 0) -> np.ndarray:
    """Rates log-uniform in [lo, hi], C-contiguous (rows, cols)."""
    rng = np.random.default_rng(seed)
    return np.ascontiguousarray(10.0 ** rng.uniform(math.log10(lo), math.log10(hi), size=(rows, cols)))


# ------------------------------------------------------------------ numpy


def dense_solve(n: int, edges, cols, X: np.ndarray) -> np.ndarray:
    """Batched dense LU solve (numpy.linalg.solve), assembly included.

    Row 0 of L is replaced by ones (Σp = 1), the right-hand side is e_0.
    Edges are distinct, so the off-diagonal entries are set by one fancy
    assignment (faster than ``np.add.at``)."""
    e = np.asarray(edges)
    N = X.shape[0]
    L = np.zeros((N, n, n))
    rates = X[:, cols]
    L[:, e[:, 1], e[:, 0]] = rates
    L[:, np.arange(n), np.arange(n)] -= L.sum(axis=1)
    L[:, 0, :] = 1.0
    rhs = np.zeros((N, n, 1))
    rhs[:, 0, 0] = 1.0
    return np.linalg.solve(L, rhs)[..., 0]


# ------------------------------------------------------------------ SymPy


def sympy_route(n: int, edges, cols):
    """Derive the tree sums in SymPy, then ``lambdify(..., "numpy", cse=True)``.

    ρ_i is the principal minor of −L with row and column i removed (Kirchhoff's
    Matrix-Tree theorem, Tutte's directed form), computed exactly as a
    polynomial over ZZ[q] (SymPy's DomainMatrix, fraction-free elimination),
    which is its expanded sum over the spanning trees rooted at i. Returns ``(f, info)`` where ``f(X)`` gives P
    (N, n) and ``info`` holds the times of derivation, cse and lambdify and the
    operation count left after cse (``sympy.count_ops`` on the reduced forms).
    """
    import sympy
    from sympy.polys.matrices import DomainMatrix

    syms = [sympy.Symbol(f"q{k}", positive=True) for k in range(len(edges))]
    A = sympy.zeros(n, n)               # A = −L: diagonal Σ out-rates, off-diagonal −q(i→j)
    for (i, j), q in zip(edges, syms):
        A[j, i] -= q
        A[i, i] += q
    t0 = time.perf_counter()
    ring = sympy.ZZ[tuple(syms)]
    rho = []
    for i in range(n):
        keep = [k for k in range(n) if k != i]
        minor = DomainMatrix.from_Matrix(A.extract(keep, keep)).convert_to(ring)
        rho.append(ring.to_sympy(minor.det()))
    t_derive = time.perf_counter() - t0
    t0 = time.perf_counter()
    repl, reduced = sympy.cse(rho)
    t_cse = time.perf_counter() - t0
    ops = sum(sympy.count_ops(r) for _, r in repl) + sum(sympy.count_ops(r) for r in reduced)
    t0 = time.perf_counter()
    g = sympy.lambdify(syms, rho, "numpy", cse=True)
    t_lambdify = time.perf_counter() - t0
    terms = [len(sympy.Add.make_args(r)) for r in rho]

    def f(X):
        R = X[:, cols]
        W = np.stack(g(*R.T), axis=1)
        return W / W.sum(axis=1, keepdims=True)

    return f, {"derive_s": t_derive, "cse_s": t_cse, "lambdify_s": t_lambdify,
               "total_s": t_derive + t_cse + t_lambdify, "ops_after_cse": int(ops),
               "tree_terms_per_state": terms}


# ------------------------------------------------------------------ Numba elimination

LANES = 8


def elimination_pattern(n: int, edges, order=None):
    """Greedy Markowitz order (fewest in·out products, fewest new edges on
    ties, lowest index last) and the fill pattern of continuous-time GTH.
    ``order`` (a permutation of the states, the kept state last) replaces the
    greedy choice: this greedy rescans every state at every step (O(n²)
    Python calls), hours on the 100×100 lattice, so the benches give large
    schemes treeflux's order — the same flops for both kernels.

    Returns a dict of int64 arrays describing, per eliminated state, the slots
    of its remaining out-edges (summed into the pivot d_k and scaled by 1/d_k),
    the update triples (dst, in-slot, out-slot) for q(i→j) += q(i→k)·q(k→j)/d_k,
    and its in-edges (slot, source state) for the back substitution
    p_k = Σ_i p_i q(i→k) / d_k. The state left last has p = 1 before
    normalisation.
    """
    slot = {e: s for s, e in enumerate(edges)}
    out = {i: set() for i in range(n)}
    inn = {i: set() for i in range(n)}
    for i, j in edges:
        out[i].add(j)
        inn[j].add(i)
    given = None if order is None else [int(v) for v in order]
    alive = set(range(n))
    order, piv_out, upd, piv_in = [], [], [], []

    def cost(k):
        new = sum(1 for i in inn[k] for j in out[k] if i != j and j not in out[i])
        return (len(inn[k]) * len(out[k]), new, -k)

    for step in range(n - 1):
        k = min(alive, key=cost) if given is None else given[step]
        alive.discard(k)
        order.append(k)
        piv_out.append([slot[(k, j)] for j in sorted(out[k])])
        piv_in.append([(slot[(i, k)], i) for i in sorted(inn[k])])
        triples = []
        for i in sorted(inn[k]):
            for j in sorted(out[k]):
                if i == j:
                    continue
                if (i, j) not in slot:
                    slot[(i, j)] = len(slot)
                    out[i].add(j)
                    inn[j].add(i)
                triples.append((slot[(i, j)], slot[(i, k)], slot[(k, j)]))
        upd.append(triples)
        for i in inn[k]:
            out[i].discard(k)
        for j in out[k]:
            inn[j].discard(k)
    last = alive.pop()

    def ragged(lists, width):
        ptr = np.zeros(len(lists) + 1, dtype=np.int64)
        ptr[1:] = np.cumsum([len(x) for x in lists])
        flat = np.array([v for x in lists for v in x], dtype=np.int64).reshape(-1, width)
        return ptr, flat

    out_ptr, out_slot = ragged(piv_out, 1)
    upd_ptr, upd_tri = ragged(upd, 3)
    in_ptr, in_pairs = ragged(piv_in, 2)
    flops = (sum(max(len(x) - 1, 0) for x in piv_out) + (n - 1)            # pivot sums, reciprocals
             + sum(len(x) for x in piv_out) + 2 * sum(len(x) for x in upd)  # scaling, updates
             + sum(2 * len(x) for x in piv_in) + 1                          # back substitution
             + (n - 1) + 1 + n)                                              # total, 1/total, scaling
    return {"order": np.array(order, dtype=np.int64), "last": last, "slots": len(slot),
            "out_ptr": out_ptr, "out_slot": out_slot[:, 0].copy(),
            "upd_ptr": upd_ptr, "upd": upd_tri, "in_ptr": in_ptr, "in": in_pairs,
            "flops": flops, "fill": len(slot) - len(edges)}


_NUMBA_KERNELS: dict = {}


def _numba_kernel(W: int):
    """Compile (once per block width ``W``) the blocked elimination kernel."""
    if W in _NUMBA_KERNELS:
        return _NUMBA_KERNELS[W]
    import numba

    @numba.njit(parallel=True, fastmath=False, boundscheck=False, cache=False)
    def kernel(X, P, cols, n_slots, order, last, out_ptr, out_slot, upd_ptr, upd, in_ptr, inn, chunks):
        N, n = P.shape
        m = cols.shape[0]
        steps = order.shape[0]
        blocks = (N + W - 1) // W
        per = (blocks + chunks - 1) // chunks
        for c in numba.prange(chunks):
            A = np.empty((n_slots, W))
            p = np.empty((n, W))
            inv = np.empty((steps, W))
            tot = np.empty(W)
            d = np.empty(W)
            for b in range(c * per, min(blocks, (c + 1) * per)):
                r0 = b * W
                full = min(W, N - r0)
                A[:, :] = 0.0
                for e in range(m):           # gather: rows of X into lanes
                    ce = cols[e]
                    for l in range(full):
                        A[e, l] = X[r0 + l, ce]
                    for l in range(full, W):
                        A[e, l] = 1.0
                for s in range(steps):       # eliminate order[s]
                    a, z = out_ptr[s], out_ptr[s + 1]
                    for l in range(W):
                        d[l] = A[out_slot[a], l]
                    for t in range(a + 1, z):
                        o = out_slot[t]
                        for l in range(W):
                            d[l] += A[o, l]
                    for l in range(W):
                        inv[s, l] = 1.0 / d[l]
                    for t in range(a, z):
                        o = out_slot[t]
                        for l in range(W):
                            A[o, l] *= inv[s, l]
                    for t in range(upd_ptr[s], upd_ptr[s + 1]):
                        dst, i_k, k_j = upd[t, 0], upd[t, 1], upd[t, 2]
                        for l in range(W):
                            A[dst, l] += A[i_k, l] * A[k_j, l]
                for l in range(W):
                    p[last, l] = 1.0
                for s in range(steps - 1, -1, -1):   # back substitution
                    k = order[s]
                    a, z = in_ptr[s], in_ptr[s + 1]
                    for l in range(W):
                        tot[l] = p[inn[a, 1], l] * A[inn[a, 0], l]
                    for t in range(a + 1, z):
                        q, i = inn[t, 0], inn[t, 1]
                        for l in range(W):
                            tot[l] += p[i, l] * A[q, l]
                    for l in range(W):
                        p[k, l] = tot[l] * inv[s, l]
                for l in range(W):
                    tot[l] = p[0, l]
                for k in range(1, n):
                    for l in range(W):
                        tot[l] += p[k, l]
                for l in range(W):
                    tot[l] = 1.0 / tot[l]
                for l in range(full):        # scatter: lanes back into rows of P
                    for k in range(n):
                        P[r0 + l, k] = p[k, l] * tot[l]
        return P

    _NUMBA_KERNELS[W] = kernel
    return kernel


class NumbaElimination:
    """Hand-written looped GTH in Numba: the best a skilled user would write.

    The elimination order and fill pattern are computed once in Python
    (:func:`elimination_pattern`); the jitted kernel walks them for blocks of
    eight parameter sets held side by side (``A[slot, lane]``), so every update
    is one 8-wide vector operation, and the blocks are split over threads with
    ``numba.prange``. Arithmetic is subtraction-free, as in treeflux.
    """

    def __init__(self, n: int, edges, *, lanes: int = LANES, order=None):
        self.n = n
        self.lanes = lanes
        self.pattern = elimination_pattern(n, edges, order)
        self.flops = self.pattern["flops"]
        self._kernel = _numba_kernel(lanes)

    def steady_state(self, X, cols, *, out=None, threads: int = 1):
        import numba

        N = X.shape[0]
        out = np.empty((N, self.n)) if out is None else out
        pt = self.pattern
        numba.set_num_threads(threads)
        return self._kernel(X, out, cols, pt["slots"], pt["order"], pt["last"], pt["out_ptr"],
                            pt["out_slot"], pt["upd_ptr"], pt["upd"], pt["in_ptr"], pt["in"], threads)


# ------------------------------------------------------------------ references


def mp_reference(n: int, edges, rates, *, dps: int = 50, check_dps: int = 90):
    """Steady state by mpmath's LU solve (partial pivoting) at ``dps`` digits.

    A second solve at ``check_dps`` digits confirms every entry; if the two
    differ by more than 1e-20 relative (cancellation in the pivots on very
    stiff rates), the precision is doubled until they agree. Returns
    ``(p, dps_used)`` with p a list of mpf.
    """
    import mpmath

    def solve(d):
        with mpmath.workdps(d):
            L = mpmath.zeros(n, n)
            for (i, j), r in zip(edges, rates):
                q = mpmath.mpf(float(r))
                L[j, i] += q
                L[i, i] -= q
            for j in range(n):
                L[0, j] = mpmath.mpf(1)
            rhs = mpmath.zeros(n, 1)
            rhs[0] = 1
            x = mpmath.lu_solve(L, rhs)
            return [x[i] for i in range(n)]

    lo, hi = dps, check_dps
    while True:
        a, b = solve(lo), solve(hi)
        with mpmath.workdps(hi):
            worst = max(abs(u - v) / abs(v) for u, v in zip(a, b))
        if worst < mpmath.mpf("1e-20"):
            return b, hi
        if hi > 2000:
            raise RuntimeError("mpmath reference did not settle below 2,000 digits")
        lo, hi = hi, 2 * hi


def worst_relative_error(values, reference) -> float:
    """max_i |v_i − r_i| / |r_i| (entrywise relative error), in float."""
    import mpmath

    with mpmath.workdps(60):
        worst = max(abs(mpmath.mpf(float(v)) - r) / abs(r) for v, r in zip(values, reference))
    return float(worst)


def digits(err: float) -> float:
    """Correct decimal digits kept: −log10 of a relative error (capped at 17)."""
    return 17.0 if err <= 0 else max(0.0, min(17.0, -math.log10(err)))


# ------------------------------------------------------------------ machine


def memory_bandwidth(mbytes: int = 256, repeat: int = 5) -> float:
    """Warm copy bandwidth in bytes/s (read + write counted), median of runs."""
    src = np.ones(mbytes * 2 ** 20 // 8)
    dst = np.empty_like(src)
    np.copyto(dst, src)
    times = []
    for _ in range(repeat):
        t0 = time.perf_counter()
        np.copyto(dst, src)
        times.append(time.perf_counter() - t0)
    return 2 * src.nbytes / float(np.median(times))


def quiet_before(key) -> None:
    """Before timing a Numba call (``key`` names "numba" or is a tuple starting
    with it): wait until treeflux's native pool threads, which spin for
    ``POOL_SPIN_SECONDS`` after each call before they sleep, have gone to
    sleep, so they do not take a core from the Numba call being timed. (The
    reverse is handled by the order of the calls: Numba's threads spin after
    its calls too, so treeflux's calls come after a one-thread call.)"""
    from treeflux.runtime.kernel import POOL_SPIN_SECONDS

    name = key[0] if isinstance(key, tuple) else key
    if isinstance(name, str) and name.startswith("numba"):
        time.sleep(2 * POOL_SPIN_SECONDS)
