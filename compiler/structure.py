"""Graph structure of a scheme: components, cycles, exact tree counts, detailed balance.

The graph functions take plain integer graphs: ``n`` states ``0..n-1`` and
``edges``, a sequence of ``(i, j)`` pairs meaning a transition i→j. They are
exact, iterative (no recursion limit) and deterministic. The scheme-level
functions :func:`detailed_balance` and :func:`structure_profile` take a
:class:`~treeflux.compiler.model.Scheme`; only :func:`detailed_balance` uses
SymPy, to decide Kolmogorov's criterion on the labels.

Notation. With ``w(i→j)`` the number of parallel edges i→j, the out-degree
Laplacian is ``K = D_out − A`` (``A[i, j] = w(i→j)``), and the generator of the
chain is ``L = −Kᵀ`` (``L[j, i] = w(i→j)``, ``L[i, i] = −Σ_k w(i→k)``).

References
----------
.. [1] W. T. Tutte, "The dissection of equilateral triangles into equilateral
   triangles", Proc. Cambridge Philos. Soc. 44 (1948) 463–482 (directed
   Matrix-Tree theorem).
.. [2] S. Chaiken, "A combinatorial proof of the all minors matrix tree
   theorem", SIAM J. Algebraic Discrete Methods 3 (1982) 319–329.
.. [3] E. H. Bareiss, "Sylvester's identity and multistep integer-preserving
   Gaussian elimination", Math. Comp. 22 (1968) 565–578.
.. [4] R. E. Tarjan, "Depth-first search and linear graph algorithms",
   SIAM J. Comput. 1 (1972) 146–160.
.. [5] A. Kolmogoroff, "Zur Theorie der Markoffschen Ketten", Math. Ann. 112
   (1936) 155–160.
"""

from __future__ import annotations

import heapq
import math
from collections import Counter

from treeflux.runtime import graph

from .errors import ModelError

__all__ = [
    "strongly_connected_components", "terminal_components", "is_reversible",
    "cycle_basis", "tree_counts", "detailed_balance", "structure_profile",
]


# ------------------------------------------------------------------ checking

def _checked(n, edges) -> list[tuple[int, int]]:
    """Validate an integer graph; return its edges as a list of int pairs."""
    if isinstance(n, bool) or not isinstance(n, int) or n < 0:
        raise ModelError(f"number of states must be a non-negative integer, got {n!r}")
    out = []
    for e in edges:
        try:
            i, j = e
        except (TypeError, ValueError):
            raise ModelError(f"edge {e!r} is not a pair (i, j)") from None
        for v in (i, j):
            if isinstance(v, bool) or not isinstance(v, int) or not 0 <= v < n:
                raise ModelError(f"edge {e!r}: state {v!r} is not an integer in 0..{n - 1}")
        out.append((i, j))
    return out


# ------------------------------------------------------------------ components

def strongly_connected_components(n: int, edges) -> list[list[int]]:
    """Strongly connected components, each sorted, ordered by smallest member.

    Tarjan's algorithm [4]_ with an explicit stack, O(n + m).

    >>> strongly_connected_components(4, [(0, 1), (1, 0), (1, 2), (3, 2)])
    [[0, 1], [2], [3]]
    """
    return graph.strongly_connected_components(n, _checked(n, edges))


def terminal_components(n: int, edges) -> list[list[int]]:
    """Strongly connected components with no edge leaving them (closed classes).

    The stationary distributions of the chain are supported on these; there is
    one extreme stationary distribution per terminal component. Same ordering
    as :func:`strongly_connected_components`.

    >>> terminal_components(3, [(0, 1), (0, 2)])
    [[1], [2]]
    """
    return graph.terminal_components(n, _checked(n, edges))


def is_reversible(n: int, edges) -> bool:
    """True when every edge i→j has its reverse j→i (self-loops are ignored)."""
    edges = _checked(n, edges)
    present = {(i, j) for i, j in edges if i != j}
    return all((j, i) in present for i, j in present)


# ------------------------------------------------------------------ cycles

def cycle_basis(n: int, edges) -> list[list[int]]:
    """Fundamental cycles of the undirected skeleton.

    The skeleton joins i and j when i→j or j→i is an edge (self-loops and
    parallel edges dropped). A breadth-first spanning tree is grown from the
    smallest state of each connected part (neighbours in increasing order);
    each non-tree pair {u, v} (u < v, in increasing order) closes one cycle,
    listed as ``[a, ..., u, v, ..., b]`` where a is the lowest common ancestor
    of u and v and the cycle closes with b→a. There are
    ``m_skeleton − n + (number of connected parts)`` cycles; together they
    form a basis of the cycle space.

    >>> cycle_basis(3, [(0, 1), (1, 2), (2, 0)])
    [[0, 1, 2]]
    """
    return [cycle for cycle, _chord in graph.fundamental_cycles(n, _checked(n, edges))]


# ------------------------------------------------------------------ tree counts

def tree_counts(n: int, edges) -> list[int]:
    """Exact number of spanning in-trees rooted at each state.

    An in-tree (in-arborescence) rooted at r is a set of n−1 edges, one leaving
    every state other than r, with no cycle; every state then has a directed
    path to r. Parallel edges count separately; self-loops never lie on a tree.

    Maths. By the directed Matrix-Tree theorem [1]_ the count is the principal
    minor ρ_r = det K^(r) of the out-degree Laplacian K = D_out − A with row and
    column r removed. The adjugate satisfies K·adj K = adj K·K = 0, and
    ``K·1 = 0``; when rank K = n − 1, which holds exactly when the graph has a
    single terminal strongly connected component T, ``adj K = 1·ρᵀ`` so ρ
    spans the left kernel of K (equivalently L ρ = 0). Otherwise adj K = 0 and
    every count is 0. In the first case ρ_r > 0 iff r ∈ T, since every state
    can reach r then.

    Computation. Pick a root r₀ ∈ T; every principal minor of K on a set W
    with r₀ ∉ W is positive (all-minors Matrix-Tree theorem [2]_: it counts
    forests rooted outside W and every state reaches r₀), so fraction-free
    Bareiss elimination [3]_ of Kᵀ needs no pivot search and may eliminate
    the states other than r₀ in any order. The order is a greedy Markowitz
    choice on the live pattern, so only the entries touched by fill are
    updated: rows untouched by a pivot are rescaled lazily by the exact ratio
    of pivots (the Bareiss identity for a zero multiplier). The last pivot is
    ρ_{r₀}; exact back-substitution in the triangular factor then gives the
    integer kernel vector ρ (every division is exact because ρ is integral).
    All arithmetic is on Python integers; no floats.

    Returns
    -------
    list of int
        ``counts[r]`` is the number of spanning trees rooted at r.

    >>> tree_counts(3, [(0, 1), (1, 0), (1, 2), (2, 1)])   # a path 0-1-2
    [1, 1, 1]
    >>> tree_counts(3, [(i, j) for i in range(3) for j in range(3) if i != j])
    [3, 3, 3]
    """
    edges = _checked(n, edges)
    if n == 0:
        return []
    terminal = terminal_components(n, edges)
    if len(terminal) != 1:
        return [0] * n
    weight = Counter((i, j) for i, j in edges if i != j)
    # Row i of Kᵀ: diagonal out(i), and −w(j→i) at column j for each edge j→i.
    rows: list[dict[int, int]] = [dict() for _ in range(n)]
    for (i, j), w in weight.items():
        rows[i][i] = rows[i].get(i, 0) + w
        rows[j][i] = rows[j].get(i, 0) - w
    col_rows: list[set[int]] = [set() for _ in range(n)]
    for i, row in enumerate(rows):
        for j in row:
            col_rows[j].add(i)
    root = max(terminal[0], key=lambda s: (len(rows[s]) + len(col_rows[s]), -s))

    def score(k: int) -> int:
        return (len(rows[k]) - 1) * (len(col_rows[k]) - 1)

    heap = [(score(k), k) for k in range(n) if k != root]
    heapq.heapify(heap)
    alive = [True] * n
    alive[root] = False            # never a pivot
    level = [0] * n                # rows[i] holds Bareiss values after step level[i]
    pivots = [1]                   # pivots[t] = leading principal minor of size t
    factor: list[tuple[int, dict[int, int]]] = []
    for step in range(1, n):
        while True:
            s, k = heapq.heappop(heap)
            if alive[k] and s == score(k):
                break
        alive[k] = False
        prev = pivots[step - 1]
        _catch_up(rows, level, k, step - 1, pivots)
        row_k = rows[k]
        pk = row_k[k]
        if pk <= 0:
            raise RuntimeError(f"internal error: non-positive Bareiss pivot {pk} at state {k}")
        rows[k] = None
        col_rows[k].discard(k)
        rest = [(j, v) for j, v in row_k.items() if j != k]
        touched = set()
        for j, _ in rest:
            col_rows[j].discard(k)
            touched.add(j)
        for i in sorted(col_rows[k]):
            _catch_up(rows, level, i, step - 1, pivots)
            row_i = rows[i]
            a = row_i.pop(k)
            for j in row_i:
                row_i[j] *= pk
            for j, v in rest:
                new = row_i.get(j, 0) - a * v
                if new:
                    if j not in row_i:
                        col_rows[j].add(i)
                        touched.add(j)
                    row_i[j] = new
                elif j in row_i:
                    del row_i[j]
                    col_rows[j].discard(i)
                    touched.add(j)
            for j in row_i:
                q, r = divmod(row_i[j], prev)
                if r:
                    raise RuntimeError("internal error: inexact Bareiss division")
                row_i[j] = q
            level[i] = step
            touched.add(i)
        col_rows[k] = set()
        factor.append((k, row_k))
        pivots.append(pk)
        for j in touched:
            if alive[j]:
                heapq.heappush(heap, (score(j), j))
    counts = [0] * n
    counts[root] = pivots[n - 1]
    for k, row_k in reversed(factor):
        total = sum(v * counts[j] for j, v in row_k.items() if j != k)
        q, r = divmod(-total, row_k[k])
        if r or q < 0:
            raise RuntimeError("internal error: kernel vector is not a non-negative integer")
        counts[k] = q
    return counts


def _catch_up(rows, level, i: int, step: int, pivots) -> None:
    """Bring row i from its stored Bareiss step to ``step`` (exact rescaling)."""
    old = level[i]
    if old == step:
        return
    num, den = pivots[step], pivots[old]
    row = rows[i]
    for j in row:
        row[j] = row[j] * num // den
    level[i] = step


def estimate_tree_counts(n: int, edges, *, log10: bool = False) -> list[float]:
    """Spanning in-tree counts per root in floating point (same meaning as
    :func:`tree_counts`), for planning: O(n³) dense linear algebra, no big integers.

    With one terminal component T, ρ = adj-kernel of K (:func:`tree_counts`):
    ρ_{r₀} = det K^(r₀) (``numpy.linalg.slogdet``) and the others solve
    ρᵀK = 0 with ρ_{r₀} fixed. Relative accuracy is that of a dense LU
    solve (ample for choosing a method; :func:`tree_counts` is exact).
    Counts beyond the float range come back as ``inf``; with ``log10`` the
    result is log10 of each count (``-inf`` for 0), which never overflows.
    """
    import numpy as np

    edges = _checked(n, edges)
    if n == 0:
        return []
    terminal = terminal_components(n, edges)
    if len(terminal) != 1:
        return [-math.inf if log10 else 0.0] * n
    if n == 1:
        return [0.0 if log10 else 1.0]
    K = np.zeros((n, n))
    for i, j in edges:
        if i != j:
            K[i, i] += 1.0
            K[i, j] -= 1.0
    r0 = max(terminal[0], key=lambda s: (K[s, s], -s))
    keep = [s for s in range(n) if s != r0]
    sign, logdet = np.linalg.slogdet(K[np.ix_(keep, keep)])
    x = np.linalg.solve(K[np.ix_(keep, keep)].T, -K[r0, keep])
    if log10:
        base = logdet / math.log(10)
        out = [-math.inf] * n
        out[r0] = base
        for s, v in zip(keep, x):
            if v > 0:
                out[s] = base + math.log10(float(v))
        return out
    scale = math.exp(logdet) if logdet < 700 else math.inf
    counts = [0.0] * n
    counts[r0] = scale
    for s, v in zip(keep, x):
        counts[s] = max(float(v), 0.0) * scale if scale != math.inf or v > 0 else 0.0
    return counts


# ------------------------------------------------------------------ schemes

def _sympy_label(label, symbols: dict):
    """A SymPy expression of a parsed label (tuple tree from :mod:`.parse`)."""
    import sympy
    kind = label[0]
    if kind == "num":
        return sympy.Rational(label[1].numerator, label[1].denominator)
    if kind == "sym":
        if label[1] not in symbols:
            symbols[label[1]] = sympy.Symbol(label[1], positive=True)
        return symbols[label[1]]
    args = [_sympy_label(a, symbols) for a in label[1:]]
    if kind == "neg":
        return -args[0]
    if kind in ("exp", "log", "sqrt"):
        return getattr(sympy, kind)(args[0])
    a, b = args
    return {"add": lambda: a + b, "sub": lambda: a - b, "mul": lambda: a * b,
            "div": lambda: a / b, "pow": lambda: a ** b}[kind]()


def _ratio_status(fwd, rev):
    """Classify Π forward / Π reverse: "holds", "fails" (a constant ≠ 1) or "depends"."""
    import sympy
    ratio = fwd / rev
    if ratio == 1:
        return "holds"
    r = sympy.cancel(ratio)
    if r == 1:
        return "holds"
    if not r.is_rational_function(*r.free_symbols):
        # cancel decides rational functions; exp, log, sqrt and symbolic powers
        # need the rewriting passes (all symbols are positive, so force is sound).
        steps = (lambda e: sympy.cancel(sympy.expand_log(sympy.powsimp(e, force=True), force=True)),
                 sympy.simplify)
        for step in steps:
            r = step(r)
            if r == 1:
                return "holds"
    if r.free_symbols:
        return "depends"
    same = r.equals(1)
    if same is None:
        same = abs(sympy.N(r - 1, 60)) < sympy.Float("1e-45")
    return "holds" if same else "fails"


# Kolmogorov's criterion is decided symbolically (SymPy) up to this many basis
# cycles of at most this total length; beyond, exactly at random points.
MAX_SYMBOLIC_CYCLES = 400
MAX_SYMBOLIC_CYCLE_LENGTH = 8_000


def detailed_balance(scheme, *, max_cycles: int = MAX_SYMBOLIC_CYCLES,
                     max_length: int = MAX_SYMBOLIC_CYCLE_LENGTH, validated=None) -> dict:
    """Decide detailed balance of a scheme from its labels (Kolmogorov's criterion).

    A chain satisfies detailed balance iff it is reversible (every edge has its
    reverse) and, around every cycle, the product of the forward labels equals
    the product of the reverse labels [5]_; it suffices to check the cycles of
    a cycle basis (:func:`cycle_basis`), since every cycle's ratio is a product
    of basis-cycle ratios and their inverses. Labels are read as SymPy
    expressions in positive symbols; for each basis cycle the ratio
    Π forward / Π reverse is reduced (``cancel``; for labels with exp, log,
    sqrt or symbolic powers also ``powsimp``/``simplify``).

    Returns
    -------
    dict
        ``verdict``: True when every basis ratio is identically 1; False when
        the scheme is not reversible or some ratio is a constant other than 1;
        otherwise ``"conditional"``. ``conditions``: one string
        ``"<Π forward> = <Π reverse>"`` per basis cycle whose ratio is not
        identically 1 (empty unless the verdict is "conditional").
        ``cycles``: every basis cycle as a list of state names, forward
        direction in list order, closing back to the first. ``reason``: one
        line explaining the verdict.

    Bounded: a reversible scheme without cycles balances (no SymPy). With
    more than ``max_cycles`` basis cycles, or cycles longer than
    ``max_length`` in total, the criterion is tested exactly at random
    points instead (:func:`balanced_at_random_points`; the verdict is True,
    "conditional" or None, no conditions or cycles are listed, and the
    reason says so). Labels are converted to SymPy only on cycle edges.
    """
    if validated is None:               # (n, edge_list) from a caller that validated already
        scheme.validate()
        validated = (len(scheme.states), scheme.edge_list())
    n, edges = validated
    states = scheme.states
    present = {(e.source, e.target) for e in scheme.edges}
    for e in scheme.edges:
        if (e.target, e.source) not in present:
            return {"verdict": False, "conditions": [], "cycles": [],
                    "reason": f"not reversible: edge {e.source}->{e.target} has no reverse edge"}
    skeleton = {(min(i, j), max(i, j)) for i, j in edges}
    n_cycles = len(skeleton) - n + _connected_parts(n, skeleton)
    if n_cycles == 0:
        return {"verdict": True, "conditions": [], "cycles": [],
                "reason": "reversible and without cycles: detailed balance always holds"}
    cycles = cycle_basis(n, edges) if n_cycles <= max_cycles else None
    length = sum(len(c) for c in cycles) if cycles is not None else None
    if cycles is None or length > max_length:
        verdict = balanced_at_random_points(scheme)
        size = (f"{n_cycles:,} basis cycles" if cycles is None
                else f"basis cycles of total length {length:,}")
        how = ({True: "holds", "conditional": "fails at a random point, so it holds only conditionally",
                None: "could not be tested (a label is not a rational function)"}[verdict])
        return {"verdict": verdict, "conditions": [], "cycles": [],
                "reason": f"{size}: beyond the symbolic limit ({max_cycles:,} cycles, total length "
                          f"{max_length:,}); tested exactly at random points modulo a prime "
                          f"(Schwartz-Zippel): {how}"}
    import sympy
    symbols: dict = {}
    by_pair = {(i, j): e for (i, j), e in zip(edges, scheme.edges)}
    label: dict = {}

    def lab(i, j):
        if (i, j) not in label:
            label[(i, j)] = _sympy_label(by_pair[(i, j)].label, symbols)
        return label[(i, j)]

    cycles = cycle_basis(n, edges)
    conditions = []
    for cyc in cycles:
        ring = list(zip(cyc, cyc[1:] + cyc[:1]))
        fwd = sympy.Mul(*[lab(a, b) for a, b in ring])
        rev = sympy.Mul(*[lab(b, a) for a, b in ring])
        status = _ratio_status(fwd, rev)
        names = [states[s] for s in cyc]
        if status == "fails":
            path = "->".join(names + names[:1])
            return {"verdict": False, "conditions": [],
                    "cycles": [[states[s] for s in c] for c in cycles],
                    "reason": f"cycle {path}: the product of forward rates differs from the "
                              f"product of reverse rates for all values"}
        if status == "depends":
            conditions.append(fwd / rev)
    if conditions:
        from .balance import condition_texts, reduce_conditions
        conditions = condition_texts(reduce_conditions(conditions))
    named = [[states[s] for s in c] for c in cycles]
    if conditions:
        return {"verdict": "conditional", "conditions": conditions, "cycles": named,
                "reason": f"{len(conditions)} of {len(cycles)} basis cycles balance only "
                          f"when their conditions hold"}
    reason = (f"every basis cycle balances identically ({len(cycles)} checked)" if cycles
              else "reversible and without cycles: detailed balance always holds")
    return {"verdict": True, "conditions": [], "cycles": named, "reason": reason}


# A Mersenne prime: arithmetic modulo it stays on machine-size integers.
_PRIME = 2 ** 61 - 1


def _connected_parts(n: int, pairs) -> int:
    """Connected parts of an undirected graph (union-find with path halving)."""
    parent = list(range(n))

    def find(a):
        while parent[a] != a:
            parent[a] = parent[parent[a]]
            a = parent[a]
        return a

    parts = n
    for i, j in pairs:
        a, b = find(i), find(j)
        if a != b:
            parent[a] = b
            parts -= 1
    return parts


def balanced_at_random_points(scheme, *, points: int = 2, seed: int = 0):
    """Detailed balance tested exactly at random points (large schemes), in O(n + m).

    The symbolic test costs a SymPy reduction per basis cycle; for schemes
    with thousands of cycles this test instead evaluates the labels exactly
    (Fractions) at random positive integer points, reduces them modulo the
    prime P = 2^61 - 1, builds the equilibrium weights x along a
    breadth-first tree (x_b = x_a l(a->b)/l(b->a) mod P) and checks
    x_i l(i->j) = x_j l(j->i) mod P on every reversible pair. Working modulo
    P keeps every number to 61 bits, where exact rationals would grow by 31
    bits per step along a long path (a 50,000-state chain).

    A balance that holds identically holds at every point and modulo P (a
    point where some rate is 0 modulo P is skipped). One that does not hold
    is a nonzero rational function of degree d; it vanishes at a random
    point of a set of size S with probability at most d/S (Schwartz, J. ACM
    27 (1980) 701-717; Zippel 1979), and its nonzero value is divisible by P
    with probability about 1/P: a wrong True is practically excluded.
    Returns True, "conditional" (fails at some point) or None when a label is
    not a rational function (exp, log, sqrt, fractional powers) or the scheme
    is not reversible.
    """
    import random
    from fractions import Fraction

    from .ir import Graph, evaluate, lower_label

    scheme.validate()
    n = len(scheme.states)
    edges = scheme.edge_list()
    if not is_reversible(n, edges):
        return None
    g = Graph()
    column = {name: j for j, name in enumerate(scheme.symbols)}
    nodes = [lower_label(g, e.label, column) for e in scheme.edges]
    rng = random.Random(seed)
    index = {e: k for k, e in enumerate(edges)}
    tree = graph.breadth_first_parents(n, edges)
    done = tries = 0
    while done < points and tries < 4 * points:
        tries += 1
        values = [Fraction(rng.randint(1, 2 ** 31)) for _ in scheme.symbols]
        try:
            exact = evaluate(g, nodes, values, "exact")
        except (TypeError, ValueError, ZeroDivisionError, OverflowError):
            return None
        rate = []
        for v in exact:
            if isinstance(v, int):
                v = Fraction(v)
            if not isinstance(v, Fraction):
                return None
            num, den = v.numerator % _PRIME, v.denominator % _PRIME
            if num == 0 or den == 0:
                break
            rate.append(num * pow(den, -1, _PRIME) % _PRIME)
        if len(rate) != len(exact):
            continue                       # a rate vanishes modulo P: draw another point
        done += 1
        x = [0] * n
        for v in tree.order:
            a = tree.parent[v]
            x[v] = 1 if a < 0 else x[a] * rate[index[(a, v)]] % _PRIME * pow(rate[index[(v, a)]], -1, _PRIME) % _PRIME
        for (i, j), k in index.items():
            if x[i] * rate[k] % _PRIME != x[j] * rate[index[(j, i)]] % _PRIME:
                return "conditional"
    return True if done else None


def structure_profile(scheme) -> dict:
    """A JSON-serialisable summary of a scheme's graph structure.

    Keys: ``states`` (names), ``edges`` (count), ``strongly_connected``,
    ``terminal_components`` (lists of names), ``reversible``,
    ``detailed_balance`` (True, False or "conditional") with
    ``detailed_balance_conditions`` (list of "lhs = rhs" strings), ``trees``
    (state name → decimal string of the exact number of spanning in-trees
    rooted there, :func:`tree_counts`) and ``implicit_symbols``.
    """
    scheme.validate()
    states = list(scheme.states)
    n = len(states)
    edges = scheme.edge_list()
    balance = detailed_balance(scheme)
    counts = tree_counts(n, edges)
    return {
        "states": states,
        "edges": len(edges),
        "strongly_connected": len(strongly_connected_components(n, edges)) == 1,
        "terminal_components": [[states[s] for s in c] for c in terminal_components(n, edges)],
        "reversible": is_reversible(n, edges),
        "detailed_balance": balance["verdict"],
        "detailed_balance_conditions": list(balance["conditions"]),
        "trees": {states[i]: str(c) for i, c in enumerate(counts)},
        "implicit_symbols": bool(scheme.implicit_symbols),
    }
