"""Common-factor extraction (greedy multivariate Horner) and pair CSE.

**Horner.** A sum is read as a polynomial: each operand is a monomial, a
multiset of *atoms* — the operands of an unshared product, and for an
unshared quotient ``a / b`` the atoms of ``a`` together with the inverse
atoms of ``b``. Shared nodes stay whole atoms (their value is computed once
anyway). Then, recursively,

    Σ_k m_k = a · (Σ_{k: a | m_k} m_k / a) + Σ_{k: a ∤ m_k} m_k

where ``a`` is the atom dividing the most monomials (ties: the smallest node
id, so the output is deterministic). This is the greedy multivariate Horner
scheme (Ceberio & Kreinovich, ACM SIGSAM Bull. 38 (2004) 8–15, review the
method; the greedy "most frequent variable" choice is common practice). Each
sub-sum is memoised on its sorted list of monomials, and the graph interns
rows, so identical sub-sums of different outputs — for tree sums, the forests
shared by the trees of different roots — are built once. An inverse atom
factors into a division: Σ a_k / d = (Σ a_k) / d. No step subtracts.

**Pair CSE.** Afterwards, pairs of operands that several n-ary sums or
products (three or more operands) have in common become one node, most
frequent pair first (greedy, as in Paar's algorithm for constant
multiplication blocks, IEEE ISIT 1997; the principle is common practice).
A sum whose pulled-out atoms share one cofactor is regrouped,
a·Q + b·Q = (a + b)·Q, so a product of sums expanded into its monomials
factors back into the product. (References cited from memory.)

The pass keeps its result only if it does not raise the operation count
(:func:`treeflux.compiler.ir.count_ops` of every output), so it never makes a
Function worse.
"""

from __future__ import annotations

from collections import Counter, defaultdict

from ..ir import Function, Graph, count_ops, live
from .rewrite import COMMUTATIVE, nary, rebuild, roots_of, use_counts

# an atom is 2·node + 1 for the inverse of the node, 2·node for the node itself


def _atoms(old: Graph, uses, m, a: int, out: list, inverse: bool) -> None:
    """Append the atoms of old node ``a`` (new ids via ``m``) to ``out``."""
    op = old.ops[a]
    if uses[a] == 1 and op == "mul":
        for x in old.args[a]:
            _atoms(old, uses, m, x, out, inverse)
    elif uses[a] == 1 and op == "div":
        num, den = old.args[a]
        _atoms(old, uses, m, num, out, inverse)
        _atoms(old, uses, m, den, out, not inverse)
    elif op == "const" and old.data[a] == 1:
        return
    else:
        out.append(2 * m[a] + inverse)


class _Horner:
    """Builds sums of monomials into a graph with memoised greedy Horner."""

    def __init__(self, g: Graph):
        self.g = g
        self.memo: dict[tuple, int] = {}

    def monomial(self, atoms) -> int:
        g = self.g
        num = [a >> 1 for a in atoms if not a & 1]
        den = [a >> 1 for a in atoms if a & 1]
        top = nary(g, "mul", num) if num else g.const(1)
        return g.node("div", (top, nary(g, "mul", den))) if den else top

    def times(self, atom: int, node: int) -> int:
        g = self.g
        if atom & 1:
            return g.node("div", (node, atom >> 1))
        if g.ops[node] == "const" and g.data[node] == 1:
            return atom >> 1
        return nary(g, "mul", (atom >> 1, node))

    def sum(self, monos: list[tuple]) -> int:
        key = tuple(sorted(monos))
        found = self.memo.get(key)
        if found is not None:
            return found
        if len(key) == 1:
            node = self.monomial(key[0])
        else:
            node = self._build(list(key))
        self.memo[key] = node
        return node

    def _build(self, monos: list[tuple]) -> int:
        g = self.g
        pulled: list[tuple[int, int]] = []      # (atom, cofactor node)
        while len(monos) > 1:
            count = Counter()
            for mono in monos:
                count.update(set(mono))
            best, n = None, 1
            for atom, c in count.items():
                if c > n or (c == n and best is not None and atom < best):
                    best, n = atom, c
            if best is None:
                break
            inner, rest = [], []
            for mono in monos:
                if best in mono:
                    j = mono.index(best)
                    inner.append(mono[:j] + mono[j + 1:])
                else:
                    rest.append(mono)
            pulled.append((best, self.sum(inner)))
            monos = rest
        terms = [self.monomial(mono) for mono in monos]
        # a·Q + b·Q + … = (a + b + …)·Q for plain atoms sharing a cofactor Q
        by_cofactor: dict[int, list[int]] = {}
        for atom, q in pulled:
            if atom & 1:
                terms.append(self.times(atom, q))
            else:
                by_cofactor.setdefault(q, []).append(atom >> 1)
        for q, xs in by_cofactor.items():
            s = nary(g, "add", xs)
            terms.append(s if g.ops[q] == "const" and g.data[q] == 1 else nary(g, "mul", (s, q)))
        return nary(g, "add", terms)


def horner(fn: Function) -> Function:
    """Greedy multivariate Horner on every sum (no pair CSE, no guard)."""
    old = fn.graph
    uses = use_counts(fn)
    mapping: dict[int, int] = {}
    state: dict = {}

    def row(g, i, op, args, data):
        if op != "add":
            node = nary(g, op, args) if op in COMMUTATIVE else g.node(op, args, data)
        else:
            h = state.get("h")
            if h is None or h.g is not g:
                h = state["h"] = _Horner(g)
            monos = []
            for a_old in old.args[i]:
                atoms: list[int] = []
                _atoms(old, uses, mapping, a_old, atoms, False)
                monos.append(tuple(sorted(atoms)))
            node = h.sum(monos)
        mapping[i] = node
        return node

    return rebuild(fn, row)


def pair_cse(fn: Function, *, min_operands: int = 3) -> Function:
    """Share operand pairs common to several n-ary sums or products.

    Repeatedly the pair (x, y) contained in the most ``add`` (or ``mul``) rows
    with at least ``min_operands`` operands becomes a node of its own and
    replaces x and y in those rows, until no pair occurs twice.
    """
    g = fn.graph
    rows = [i for i in live(g, roots_of(fn))
            if g.ops[i] in ("add", "mul") and len(g.args[i]) >= min_operands]
    if not rows:
        return fn
    # operands are tokens: ("n", old id) or ("p", op, token, token)
    operands: dict[int, list] = {i: [("n", a) for a in g.args[i]] for i in rows}
    index: dict[tuple, set] = defaultdict(set)

    def pairs(i):
        ops_ = sorted(set(operands[i]))
        op = g.ops[i]
        return [(op, ops_[a], ops_[b]) for a in range(len(ops_)) for b in range(a + 1, len(ops_))]

    for i in rows:
        if len(g.args[i]) <= 40:
            for p in pairs(i):
                index[p].add(i)
    while True:
        best, users = None, ()
        for p, us in index.items():
            if len(us) > len(users) or (len(us) == len(users) and len(us) >= 2 and p < best):
                best, users = p, us
        if best is None or len(users) < 2:
            break
        op, x, y = best
        token = ("p", op, x, y)
        for i in sorted(users):
            for p in pairs(i):
                index[p].discard(i)
            lst = operands[i]
            lst.remove(x)
            lst.remove(y)
            lst.append(token)
        for i in sorted(users):
            if len(operands[i]) >= 2:
                for p in pairs(i):
                    index[p].add(i)
        for p in [p for p, us in index.items() if not us]:
            del index[p]

    made: dict[tuple, int] = {}

    def realize(ng, tok, m):
        if tok[0] == "n":
            return m[tok[1]]
        node = made.get(tok)
        if node is None:
            node = made[tok] = nary(ng, tok[1], (realize(ng, tok[2], m), realize(ng, tok[3], m)))
        return node

    m_all: dict[int, int] = {}

    def row(ng, i, op, args, data):
        if i in operands:
            node = nary(ng, op, [realize(ng, t, m_all) for t in operands[i]])
        elif op in COMMUTATIVE:
            node = nary(ng, op, args)
        else:
            node = ng.node(op, args, data)
        m_all[i] = node
        return node

    return rebuild(fn, row)


def factor(fn: Function) -> Function:
    """Horner factoring then pair CSE; kept only if the operation count drops.

    Parameters
    ----------
    fn : Function
        Best in canonical form (:func:`canonical`), so that products are flat.

    Returns
    -------
    Function
        Equal values, subtraction-free wherever ``fn`` was.
    """
    before = count_ops(fn.graph, roots_of(fn))["total"]
    out = pair_cse(horner(fn))
    after = count_ops(out.graph, roots_of(out))["total"]
    if after > before:
        guarded = pair_cse(fn)
        return guarded if count_ops(guarded.graph, roots_of(guarded))["total"] <= before else fn
    return out
