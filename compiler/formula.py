"""Closed forms people can read, at any size.

Two forms of a normalised steady-state probability or observable:

**Shared form** (default, :func:`shared_form`): the expression DAG the front
end builds, printed as a short program — every subexpression used more than
once is bound once to a name (``t1 = …``), the unnormalised weights are named
``rho_<state>`` and their sum ``Z``, then the result. Its length is the
operation count of the DAG (never the DAG unfolded into a tree), so a
16-state scheme prints in a few hundred lines. With the equilibrium method
the weights are path products (Boltzmann weights) ρ_i = Π ℓ(forward)/ℓ(reverse)
along a path from the reference state.

**Coefficient form** (:func:`coefficient_form`, ``collect=[...]``): numerator
and denominator as polynomials in chosen inputs, each coefficient a
subtraction-free sum of products of rate constants — the form enzyme
kineticists publish (the result of the King–Altman method). It expands tree
sums, so it is refused above :data:`MAX_TERMS` tree terms, with the count.

``sets`` substitutes values before anything is built (initial-rate
conditions such as P = Q = 0): a label that becomes 0 removes its edge.
Everything shown is a model prediction of the scheme as written.
"""

from __future__ import annotations

from fractions import Fraction

from . import ir
from .errors import ModelError, TooLargeError
from .frontend import build
from .model import Scheme
from .pipeline import weighted_node

__all__ = ["substituted", "shared_form", "coefficient_form", "MAX_TERMS", "MAX_SHARED_OPS"]

# Coefficient form: the sum over roots of the spanning-tree counts.
MAX_TERMS = 20_000
# Shared form: operations of the DAG printed.
MAX_SHARED_OPS = 60_000


# ---------------------------------------------------------------- substitution

def _subst(label, values: dict):
    """The label with the given symbols replaced by numbers, zeros folded away
    (x·0 = 0, x + 0 = x, 0/x = 0), so a rate that vanishes becomes ("num", 0)."""
    op = label[0]
    if op == "sym":
        return ("num", values[label[1]]) if label[1] in values else label
    if op == "num":
        return label
    args = [_subst(a, values) for a in label[1:]]
    zero = [a[0] == "num" and a[1] == 0 for a in args]
    if op == "mul" and any(zero):
        return ("num", Fraction(0))
    if op == "div" and zero[0]:
        return ("num", Fraction(0))
    if op == "add" and any(zero):
        rest = [a for a, z in zip(args, zero) if not z]
        return rest[0] if len(rest) == 1 else ("num", Fraction(0)) if not rest else (op, *rest)
    return (op, *args)


def substituted(scheme: Scheme, sets: dict) -> Scheme:
    """A copy of ``scheme`` with the symbols in ``sets`` replaced by their
    values; edges whose rate becomes exactly 0 are dropped, a rate that
    becomes negative is refused."""
    from .parse import label_text

    if not sets:
        return scheme
    known = set(scheme.symbols)
    for name in sets:
        if name not in known:
            raise ModelError(f"{scheme.origin}: --set names unknown symbol {name!r}; "
                             f"symbols are {', '.join(scheme.symbols)}")
    values = {k: Fraction(v) for k, v in sets.items()}
    out = Scheme(name=scheme.name, origin=scheme.origin)
    for s in scheme.parameters:
        if s.name not in values:
            out.add_parameter(s.name, value=s.value, min=s.min, max=s.max)
    for s in scheme.inputs:
        if s.name not in values:
            out.add_input(s.name, value=s.value, min=s.min, max=s.max)
    for st in scheme.states:
        out.add_state(st)
    g = ir.Graph()
    for e in scheme.edges:
        label = _subst(e.label, values)
        if not any(True for _ in _symbols(label)):
            try:
                v = ir.evaluate(g, [ir.lower_label(g, label, {})], [], "exact")[0]
            except (ZeroDivisionError, ValueError, TypeError, OverflowError):
                raise ModelError(f"{scheme.origin}: edge {e.source}->{e.target}: rate {e.rate!r} "
                                 f"cannot be evaluated at the values given") from None
            if v == 0:
                continue
            if v < 0:
                raise ModelError(f"{scheme.origin}: edge {e.source}->{e.target}: rate {e.rate!r} "
                                 f"is negative at the values given")
        out.add_edge(e.source, e.target, label_text(label))
    for name, terms in scheme.observable_terms().items():
        out.add_observable(name, _substituted_weights(terms, values, scheme.states[0]))
    if not out.edges:
        raise ModelError(f"{scheme.origin}: every rate is zero at the values given")
    return out


def _substituted_weights(terms, values: dict, first: str) -> dict:
    """An observable's terms after substitution, as state → weight text (a
    flux through an edge whose rate became 0 is 0 and drops out)."""
    from .parse import label_text

    merged: dict = {}
    for st, label in terms:
        label = _subst(label, values)
        if not any(True for _ in _symbols(label)):
            g = ir.Graph()
            try:
                if ir.evaluate(g, [ir.lower_label(g, label, {})], [], "exact")[0] == 0:
                    continue
            except (ZeroDivisionError, ValueError, TypeError, OverflowError):
                pass  # kept as written: the compiled form reports it
        merged[st] = ("add", merged[st], label) if st in merged else label
    return {st: label_text(w) for st, w in merged.items()} or {first: 0.0}


def _symbols(label):
    if label[0] == "sym":
        yield label[1]
    elif label[0] != "num":
        for a in label[1:]:
            yield from _symbols(a)


def _target(scheme: Scheme, state, observable) -> tuple[str, list]:
    """(name, [(state, weight label)]) of what is asked for: an observable
    reduced to Σ_i p_i·w_i (numbers, rate expressions, edge rates for fluxes,
    ``("neg", ℓ)`` for the backward half of a net flux)."""
    if state is not None and observable is not None:
        raise ModelError("ask for a state or an observable, not both")
    if observable is not None:
        obs = scheme.observable_terms()
        if observable not in obs:
            raise ModelError(f"{scheme.origin}: unknown observable {observable!r}; "
                             f"observables are {', '.join(obs) or 'none'}")
        return observable, [(st, _readable(w)) for st, w in obs[observable]]
    if state is None:
        return "", []
    if state not in scheme.states:
        raise ModelError(f"{scheme.origin}: unknown state {state!r}; states are {', '.join(scheme.states)}")
    return f"p_{state}", [(state, ("num", Fraction(1)))]


def _readable(label):
    """A weight label with its numbers as short fractions (0.1, not the
    binary fraction nearest to it)."""
    if label[0] == "num":
        return ("num", Fraction(label[1]).limit_denominator(10**12))
    if label[0] == "sym":
        return label
    return (label[0], *(_readable(a) for a in label[1:]))


# ---------------------------------------------------------------- printing the DAG

_PREC = {"add": 1, "sub": 1, "neg": 2, "mul": 3, "div": 3, "pow": 5}


class _Printer:
    def __init__(self, g: ir.Graph, symbols, latex: bool):
        self.g, self.symbols, self.latex = g, list(symbols), latex

    def name(self, text: str) -> str:
        if not self.latex:
            return text
        return r"\mathrm{" + text.replace("\\", r"\backslash ").replace("_", r"\_").replace("{", r"\{") \
            .replace("}", r"\}").replace("#", r"\#").replace("%", r"\%").replace("&", r"\&") \
            .replace("$", r"\$").replace("^", r"\^{}").replace("~", r"\~{}") + "}"

    def const(self, v: Fraction) -> tuple[str, int]:
        if v.denominator == 1:
            return str(v.numerator), (6 if v >= 0 else 2)
        if self.latex:
            return rf"\frac{{{v.numerator}}}{{{v.denominator}}}", 6
        return f"{v.numerator}/{v.denominator}", 3

    def expr(self, v: int, bound: dict) -> tuple[str, int]:
        """(text, precedence) of node v, with bound nodes printed by name."""
        if v in bound:
            return bound[v], 6
        g = self.g
        op, args = g.ops[v], g.args[v]
        if op == "input":
            return self.name(self.symbols[g.data[v]]), 6
        if op == "const":
            return self.const(g.data[v])
        parts = [self.expr(a, bound) for a in args]

        def wrap(p, prec, strict=False):
            return f"({p[0]})" if p[1] < prec or (strict and p[1] == prec) else p[0]

        if op == "add":
            return " + ".join(wrap(p, 1) for p in parts), 1
        if op == "sub":
            return f"{wrap(parts[0], 1)} - {wrap(parts[1], 1, True)}", 1
        if op == "neg":
            return f"-{wrap(parts[0], 3)}", 2
        if op == "mul":
            sep = r" \cdot " if self.latex else "*"
            return sep.join(wrap(p, 3) for p in parts), 3
        if op == "div":
            if self.latex:
                return rf"\frac{{{parts[0][0]}}}{{{parts[1][0]}}}", 6
            return f"{wrap(parts[0], 3)}/{wrap(parts[1], 3, True)}", 3
        if op == "pow":
            if self.latex:
                return f"{{{wrap(parts[0], 6, True)}}}^{{{parts[1][0]}}}", 5
            return f"{wrap(parts[0], 6, True)}**{wrap(parts[1], 6, True)}", 5
        if op in ("exp", "log", "sqrt"):
            if self.latex:
                return (rf"\sqrt{{{parts[0][0]}}}" if op == "sqrt" else rf"\{op}\left({parts[0][0]}\right)"), 6
            return f"{op}({parts[0][0]})", 6
        if op == "max":
            inner = ", ".join(p[0] for p in parts)
            return (rf"\max\left({inner}\right)" if self.latex else f"max({inner})"), 6
        raise ValueError(f"cannot print operation {op!r}")


def _uses(g: ir.Graph, roots) -> dict:
    count: dict = {}
    for v in ir.live(g, roots):
        for a in g.args[v]:
            count[a] = count.get(a, 0) + 1
    return count


def shared_form(scheme: Scheme, *, state=None, observable=None, method: str = "elimination",
                sets=None, latex: bool = False) -> str:
    """The shared (named-subexpression) form; see the module docstring."""
    scheme = substituted(scheme, sets or {})
    target, weights = _target(scheme, state, observable)
    if method not in ("elimination", "equilibrium", "trees"):
        raise ModelError(f"formula: method {method!r} has no closed form; use elimination, "
                         "equilibrium or trees")
    fn, info = build(scheme, method=method, scale=False)
    if "p" not in fn.groups:
        comps = "; ".join("{" + ", ".join(scheme.states[i] for i in c) + "}" for c in info.components)
        raise ModelError(f"{scheme.origin}: the scheme has {len(info.components)} terminal components "
                         f"({comps}); its steady state is not unique, so no single formula exists")
    g = fn.graph
    rho = fn.group("rho")
    n = len(scheme.states)
    index = scheme.index()
    total = g.add(*[r for r in rho if g.ops[r] != "const" or g.data[r] != 0])
    ops = ir.count_ops(g, [total])["total"]
    if ops > MAX_SHARED_OPS:
        raise TooLargeError(f"{scheme.origin}: the shared form has {ops:,} operations "
                            f"(limit {MAX_SHARED_OPS:,}); evaluate the scheme numerically instead")
    pr = _Printer(g, scheme.symbols, latex)
    # What is shown: every rho (so Z reads as their sum) and the target.
    if weights:
        shown = [index[s] for s, _ in weights if g.ops[rho[index[s]]] != "const" or g.data[rho[index[s]]] != 0]
    else:
        shown = list(range(n))
    roots = [rho[i] for i in range(n)] + [total]
    uses = _uses(g, roots)
    named: dict = {}
    aliases = []
    for i in range(n):
        if g.ops[rho[i]] in ("const", "input"):
            continue
        own = pr.name(f"rho_{scheme.states[i]}")
        if rho[i] in named:  # the same expression as another state's weight
            aliases.append((own, named[rho[i]]))
        else:
            named[rho[i]] = own
    lines = []
    eq = " &= " if latex else " = "
    counter = 0
    for v in ir.live(g, roots[:-1]):
        if g.ops[v] in ("input", "const"):
            continue
        if v in named or uses.get(v, 0) > 1:
            if v not in named:
                counter += 1
                named[v] = pr.name(f"t{counter}") if latex else f"t{counter}"
            text, _ = pr.expr(v, {k: s for k, s in named.items() if k != v})
            lines.append(f"{named[v]}{eq}{text}")
    lines += [f"{a}{eq}{b}" for a, b in aliases]
    rho_text = {}
    for i in range(n):
        if g.ops[rho[i]] in ("const", "input"):
            rho_text[i] = pr.expr(rho[i], named)[0]
        else:
            rho_text[i] = pr.name(f"rho_{scheme.states[i]}")
    lines.append("Z" + eq + " + ".join(t for t in rho_text.values() if t != "0"))
    head = pr.name(target) if target else None
    if weights:
        column = {name: j for j, name in enumerate(scheme.symbols)}
        node = weighted_node(g, weights, rho, index, column)
        num, prec = pr.expr(node, {**named, **{rho[i]: rho_text[i] for i in range(n)
                                               if g.ops[rho[i]] not in ("const", "input")}})
        result = rf"\frac{{{num}}}{{Z}}" if latex else (f"({num})/Z" if prec < 3 else f"{num}/Z")
        lines.append(f"{head}{eq}{result}")
    else:
        for i in shown:
            name = pr.name(f"p_{scheme.states[i]}")
            result = rf"\frac{{{rho_text[i]}}}{{Z}}" if latex else f"{rho_text[i]}/Z"
            lines.append(f"{name}{eq}{result}")
    if latex:
        return "\\begin{aligned}\n" + " \\\\\n".join(lines) + "\n\\end{aligned}\n"
    kind = {"equilibrium": "path products (Boltzmann weights) along a spanning tree",
            "elimination": "subtraction-free elimination, weights relative to the last state",
            "trees": "sums over rooted spanning trees"}[method]
    note = (f"# {scheme.name}: steady state as a model prediction ({kind}); "
            f"{counter} shared subexpressions")
    return note + "\n" + "\n".join(lines) + "\n"


# ---------------------------------------------------------------- coefficient form

def coefficient_form(scheme: Scheme, *, collect, state=None, observable=None, sets=None,
                     latex: bool = False) -> str:
    """Numerator and denominator as polynomials in the ``collect`` symbols."""
    import sympy

    from .structure import terminal_components, tree_counts

    scheme = substituted(scheme, sets or {})
    target, weights = _target(scheme, state, observable)
    if not weights:
        raise ModelError("the coefficient form needs --state or --observable")
    for c in collect:
        if c not in scheme.symbols:
            raise ModelError(f"{scheme.origin}: --collect names {c!r}, which is not a symbol "
                             f"({', '.join(scheme.symbols)})")
    n = len(scheme.states)
    edges = scheme.edge_list()
    if len(terminal_components(n, edges)) != 1:
        raise ModelError(f"{scheme.origin}: the steady state is not unique (several terminal "
                         "components), so no single formula exists")
    if n > 400:
        raise TooLargeError(f"{scheme.origin}: {n} states: the polynomial form is far too large")
    terms = sum(tree_counts(n, edges))
    if terms > MAX_TERMS:
        raise TooLargeError(f"{scheme.origin}: the polynomial form has {terms:,} tree terms "
                            f"(limit {MAX_TERMS:,}); use the shared form")
    fn, _info = build(scheme, method="trees", scale=False)
    rho = fn.group("rho")
    column = {name: j for j, name in enumerate(scheme.symbols)}
    top = weighted_node(fn.graph, weights, rho, scheme.index(), column)
    *exprs, num = ir.to_sympy(fn.graph, list(rho) + [top], scheme.symbols)
    den = sympy.Add(*exprs)
    ratio = sympy.cancel(sympy.together(num / den))
    num, den = sympy.fraction(ratio)
    gens = [sympy.Symbol(c, positive=True) for c in collect]

    def poly_text(expr):
        poly = sympy.Poly(sympy.expand(expr), *gens)
        pieces = []
        for monom, coeff in sorted(poly.terms(), key=lambda t: (sum(t[0]), t[0])):
            coeff = sympy.factor(coeff)
            mono = sympy.Mul(*[g ** e for g, e in zip(gens, monom)])
            show = sympy.latex if latex else sympy.sstr
            if mono == 1:
                pieces.append(show(coeff))
            elif coeff == 1:
                pieces.append(show(mono))
            else:
                c = show(coeff)
                c = f"\\left({c}\\right)" if latex and coeff.is_Add else (f"({c})" if coeff.is_Add else c)
                pieces.append(f"{c} \\cdot {show(mono)}" if latex else f"{c}*{show(mono)}")
        return " + ".join(pieces) or "0", len(poly.terms())

    num_text, _ = poly_text(num)
    den_text, _ = poly_text(den)
    if latex:
        name = _Printer(None, [], True).name(target)
        return f"{name} = \\frac{{{num_text}}}{{{den_text}}}\n"
    return (f"# {scheme.name}: {target} as a model prediction, numerator and denominator as "
            f"polynomials in {', '.join(collect)}\n"
            f"{target} = N/D\nN = {num_text}\nD = {den_text}\n")
