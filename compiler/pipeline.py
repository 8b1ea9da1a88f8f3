"""The compile pipeline: scheme → plan → front end → IR passes → back end.

:func:`plan` decides the method from the structure (exact tree counts, the
flop count of elimination under the fill-reducing order, detailed balance)
and refuses requests that would exhaust memory or time, before any work.
:func:`compile_scheme` runs the stages and returns a
:class:`~treeflux.runtime.model.CompiledModel`.
"""

from __future__ import annotations

import hashlib
import importlib
import json
import pickle
import time
from dataclasses import dataclass, field
from pathlib import Path

from treeflux.runtime.kernel import RowChecks
from treeflux.runtime.model import CompiledModel, ModelInfo, symbol_floors
from treeflux.runtime.resources import available_memory, format_bytes

from . import ir
from .backends.naming import Interface, stem
from .errors import ModelError, TooLargeError
from .frontend import build
from .model import Scheme

BACKENDS = ("python", "c", "cython", "llvm")
METHODS = ("auto", "trees", "elimination", "equilibrium", "numeric")

# Straight-line code is worth it up to about this many operations; beyond,
# native compile time grows superlinearly and the looped numeric path wins
# (TECH-NOTES: Q6 ≈ 17,800 flops compiles in seconds, 90,000 in half a minute).
STRAIGHT_LINE_LIMIT = 20_000
# `treeflux compile --target c` writes straight-line C up to this many
# elimination flops (a 128-state scheme, ≈123,000 flops, emits and compiles
# with gcc -O3 in well under a minute: benches/bench_compile.py).
MAX_EMIT_C_OPS = 200_000
# Symbolic elimination builds one IR node per operation; beyond this the
# graph itself costs hundreds of megabytes.
MAX_SYMBOLIC_OPS = 1_000_000
# Tree enumeration: total factors Σ_roots count × (n−1).
MAX_TREE_FACTORS = 4_000_000
# Exact tree counts (big integers) are computed up to this many states.
MAX_COUNT_STATES = 400
# The planner counts trees exactly (big integers) when the float estimate of
# the tree factors is below this; beyond, the estimate decides.
EXACT_TREE_FACTORS = 10 ** 12
# Looped numeric elimination: flops per parameter set. At ~1 ns a flop that is
# 0.1 s per set, and its tape (16 bytes per update, half the flops) ~0.8 GB.
MAX_NUMERIC_FLOPS = 100_000_000
# formula(expand=True) lists trees only up to this many per state.
MAX_FORMULA_TREES = 20_000
# The nested closed form is built only up to this many elimination flops.
MAX_FORMULA_OPS = 50_000


@dataclass
class Plan:
    method: str
    reasons: dict = field(default_factory=dict)
    order: list | None = None  # elimination order of the whole scheme, when it is one component
    _graph: tuple | None = field(default=None, repr=False)
    _numeric: object = field(default=None, repr=False)

    @property
    def numeric(self):
        """The EliminationPlan (looped numeric path) of the whole scheme, built on
        first use — planning itself never builds the tape."""
        if self._numeric is None and self.order is not None and self._graph is not None:
            from treeflux.runtime.numeric import EliminationPlan
            n, edges = self._graph
            self._numeric = EliminationPlan(n, edges, order=self.order)
        return self._numeric


def _structure():
    from . import structure
    return structure


def _tree_factors(n: int, edges, comps):
    """(Σ over terminal components of trees × (size − 1), exact?) from the
    float estimate (:func:`structure.estimate_tree_counts`), made exact by
    big-integer counting when small; None when a component is too large to count."""
    st = _structure()
    total, exact = 0, True
    for comp in comps:
        k = len(comp)
        if k == 1:
            continue
        if k > MAX_COUNT_STATES:
            return None, False
        local = {s: a for a, s in enumerate(comp)}
        sub = [(local[i], local[j]) for i, j in edges if i in local and j in local]
        estimate = sum(st.estimate_tree_counts(k, sub)) * (k - 1)
        if estimate <= EXACT_TREE_FACTORS:
            total += sum(st.tree_counts(k, sub)) * (k - 1)
        else:
            total, exact = total + estimate, False
    return (total if exact else float(total)), exact


def plan(scheme: Scheme, method: str = "auto") -> Plan:
    """Choose (or check) the method, with the numbers that led to the choice.

    Cheap by construction: the elimination cost is counted while the order is
    chosen and stops past :data:`MAX_NUMERIC_FLOPS`; tree counts are floating
    estimates (exact only when small); detailed balance is decided
    symbolically only for a bounded number and length of cycles. A request
    whose estimate exceeds its limit — or the available memory — is refused
    here with the estimate and the method that would work.
    """
    if method not in METHODS:
        raise ModelError(f"unknown method {method!r}; choose one of {', '.join(METHODS)}")

    from treeflux.runtime import graph

    st = _structure()
    scheme.validate()
    n = len(scheme.states)
    edges = scheme.edge_list()           # valid by construction: no re-checking below
    comps = graph.terminal_components(n, edges)
    reasons: dict = {"states": n, "edges": len(edges), "terminal_components": len(comps)}
    tree_factors, exact = _tree_factors(n, edges, comps)
    if tree_factors is not None:
        reasons["tree_factors"] = (tree_factors if exact else f"about {tree_factors:.3g}"
                                   if tree_factors < float("inf") else "more than 1e308")
    cost = _elimination_cost(n, edges, comps, budget=MAX_NUMERIC_FLOPS)
    flops = cost.flops
    reasons["elimination_flops"] = flops
    reasons["fill"] = cost.fill
    reasons["numeric_tape_bytes"] = cost.tape_bytes
    if not cost.complete:
        reasons["elimination_note"] = (f"more than {MAX_NUMERIC_FLOPS:,} flops: counting stopped there "
                                       f"(the figures are lower bounds)")
    present = set(edges)
    if not all((j, i) in present for i, j in edges):
        balance = False  # a one-way edge can never be balanced
    else:
        db = st.detailed_balance(scheme, validated=(n, edges))
        balance = db["verdict"]
        if "random points" in db["reason"]:
            reasons["detailed_balance_test"] = db["reason"]
    reasons["detailed_balance"] = balance
    reasons["limits"] = {"straight_line_ops": STRAIGHT_LINE_LIMIT, "tree_factors": MAX_TREE_FACTORS,
                         "symbolic_ops": MAX_SYMBOLIC_OPS, "numeric_flops": MAX_NUMERIC_FLOPS}
    shown_flops = f"{flops:,}" if cost.complete else f"more than {MAX_NUMERIC_FLOPS:,}"
    order = cost.order if len(comps) == 1 and len(comps[0]) == n else None

    def made(chosen):
        return Plan(chosen, reasons, order, (n, edges))

    if method == "auto":
        if balance is True and len(comps) == 1 and 3 * n <= STRAIGHT_LINE_LIMIT:
            chosen = "equilibrium"
        elif tree_factors is not None and tree_factors <= min(flops, 400):
            chosen = "trees"
        elif flops <= STRAIGHT_LINE_LIMIT or len(comps) > 1:
            chosen = "elimination"
        else:
            chosen = "numeric"
        if chosen == "elimination" and flops > MAX_SYMBOLIC_OPS:
            _refuse_numeric(scheme, cost, balance, symbolic=True)
        if chosen == "numeric":
            _check_numeric(scheme, cost, balance)
        reasons["why"] = {
            "equilibrium": "detailed balance holds identically: path products are exact and O(n)",
            "trees": "the tree sums are no larger than the elimination form",
            "elimination": f"elimination needs {flops} flops, within the straight-line limit",
            "numeric": f"elimination needs {flops} flops, beyond the straight-line limit "
                       f"{STRAIGHT_LINE_LIMIT}: looped numeric elimination (compiles nothing; "
                       f"straight-line code evaluates faster but takes long to build in process). "
                       + (f"Standalone C (`compile --target c`) is the straight-line body, in "
                          f"parts of vector statements (up to {MAX_EMIT_C_OPS:,} flops)"
                          if flops <= MAX_EMIT_C_OPS else
                          f"Standalone C is refused (above {MAX_EMIT_C_OPS:,} flops)"),
        }[chosen]
        return made(chosen)
    if method == "trees":
        if tree_factors is None or tree_factors > MAX_TREE_FACTORS:
            shown = ("more than can be counted here" if tree_factors is None
                     else f"{tree_factors:,}" if exact else f"about {tree_factors:.3g}")
            raise TooLargeError(f"{scheme.origin}: tree enumeration needs {shown} tree factors "
                                f"(limit {MAX_TREE_FACTORS:,}); use method='elimination' "
                                f"({shown_flops} flops) or 'numeric'")
    elif method == "elimination":
        if flops > MAX_SYMBOLIC_OPS:
            raise TooLargeError(f"{scheme.origin}: symbolic elimination needs "
                                f"{'about ' + shown_flops if cost.complete else shown_flops} operations "
                                f"(limit {MAX_SYMBOLIC_OPS:,}); use method='numeric'")
    elif method == "equilibrium":
        if balance is not True:
            raise ModelError(f"{scheme.origin}: method 'equilibrium' needs detailed balance to hold "
                             f"identically; it is {balance!r} here (see `treeflux profile`)")
    elif method == "numeric":
        if len(comps) > 1:
            raise ModelError(f"{scheme.origin}: the numeric path needs one terminal component; "
                             f"this scheme has {len(comps)}")
        _check_numeric(scheme, cost, balance)
    return made(method)


def _check_numeric(scheme: Scheme, cost, balance) -> None:
    """Refuse the looped numeric path when its tape exceeds the flop limit or memory."""
    avail = available_memory()
    if not cost.complete or cost.flops > MAX_NUMERIC_FLOPS:
        _refuse_numeric(scheme, cost, balance)
    if avail is not None and cost.tape_bytes > avail // 2:
        _refuse_numeric(scheme, cost, balance, avail=avail)


def _refuse_numeric(scheme: Scheme, cost, balance, *, avail=None, symbolic=False) -> None:
    more = "" if cost.complete else "more than "
    alt = ("; detailed balance holds, so method='equilibrium' (path products, O(n)) works"
           if balance is True else "; no method of treeflux fits this scheme (its elimination fill "
           "explodes): reduce it, or split it into smaller parts")
    if symbolic:
        raise TooLargeError(f"{scheme.origin}: several terminal components and symbolic elimination "
                            f"needs {more}{cost.flops:,} operations (limit {MAX_SYMBOLIC_OPS:,}){alt}")
    if avail is not None:
        raise TooLargeError(f"{scheme.origin}: the looped numeric path needs about "
                            f"{format_bytes(cost.tape_bytes)} for its elimination tape, more than half "
                            f"of the {format_bytes(avail)} of memory available{alt}")
    raise TooLargeError(f"{scheme.origin}: elimination needs {more}{cost.flops:,} flops per parameter set "
                        f"(a tape of {more}{format_bytes(cost.tape_bytes)}); the looped numeric path "
                        f"is limited to {MAX_NUMERIC_FLOPS:,}{alt}")


def _elimination_cost(n: int, edges, comps, *, budget=None):
    """Cost of elimination with the fill-reducing order, summed over the terminal
    components, counted without building a tape; stops past ``budget`` flops.

    Returns a :class:`~treeflux.runtime.numeric.EliminationCost` (``flops``,
    ``fill``, ``updates``, ``tape_bytes``, ``complete``; ``order`` of the last
    component counted)."""
    from treeflux.runtime.numeric import EliminationCost, elimination_cost

    total = EliminationCost([], 0, 0, 0, True, 0, 0)
    for comp in comps:
        local = {s: a for a, s in enumerate(comp)}
        sub = [(local[i], local[j]) for i, j in edges if i in local and j in local]
        if len(comp) > 1:
            left = None if budget is None else budget - total.flops
            c = elimination_cost(len(comp), sub, budget=left, terminal=range(len(comp)))
            total = EliminationCost(c.order, total.flops + c.flops, total.fill + c.fill,
                                    total.updates + c.updates, c.complete, total.n + c.n, total.m + c.m)
            if not c.complete:
                break
    return total


def _observable_nodes(scheme: Scheme, fn: ir.Function) -> tuple[list[int], list[list[float]]]:
    """One IR node per observable, O_k = Σ_i p_i·w_ik(θ), and the constant
    weights (n_states × n_observables; 0 where a weight is an expression).

    Weights are lowered from the symbols (never from the front end's scaled
    labels), so the derivative passes see them as ordinary functions of θ.
    Terms whose weight is ``("neg", ℓ)`` (the backward flux of a net flux)
    or a negative number are summed apart and subtracted once at the top: O = J+ − J−. That is
    the only subtraction an observable adds above the labels (the ``p``
    group stays subtraction-free), and its rounding error is bounded by a
    few ε·(J+ + J−) in absolute terms — a net flux near zero (near
    detailed balance) is known to that absolute accuracy, not relatively."""
    index = scheme.index()
    column = {name: j for j, name in enumerate(scheme.symbols)}
    p = fn.group("p")
    nodes = [weighted_node(fn.graph, terms, p, index, column) for terms in scheme.observable_terms().values()]
    return nodes, _constant_weights(scheme)


def weighted_node(g: ir.Graph, terms, values: list, index: dict, column: dict) -> int:
    """The node J+ − J− (or J+ alone) of one observable (see :func:`signed_sums`)."""
    plus, minus = signed_sums(g, terms, values, index, column)
    plus = plus if plus is not None else g.const(0)
    return plus if minus is None else g.sub(plus, minus)


def _observable_parts(scheme: Scheme, fn: ir.Function) -> list[tuple]:
    """(J+, J−) of every observable: the sums of its terms with positive and
    with negated weights (``("neg", ℓ)`` or a negative number), each
    subtraction-free above the labels, or None where there are none."""
    index = scheme.index()
    column = {name: j for j, name in enumerate(scheme.symbols)}
    p = fn.group("p")
    return [signed_sums(fn.graph, terms, p, index, column) for terms in scheme.observable_terms().values()]


def signed_sums(g: ir.Graph, terms, values: list, index: dict, column: dict) -> tuple:
    """(Σ w_i·x_i over the positive weights, Σ |w_i|·x_i over the negated
    ones) of one observable's terms [(state, weight label)], with x_i =
    ``values[index[state]]`` (the probabilities, or the unnormalised
    weights ρ for printing); None for an empty sum. Zero weights and
    states fixed at 0 (transient states) drop out."""
    sums: dict = {1: [], -1: []}
    for state, label in terms:
        sign = -1 if label[0] == "neg" or (label[0] == "num" and label[1] < 0) else 1
        label = label[1] if label[0] == "neg" else ("num", -label[1]) if sign < 0 else label
        x = values[index[state]]
        if label == ("num", 0) or (g.ops[x] == "const" and g.data[x] == 0):
            continue
        sums[sign].append(x if label == ("num", 1) else g.mul(ir.lower_label(g, label, column), x))
    return tuple(g.add(*xs) if len(xs) > 1 else xs[0] if xs else None for xs in (sums[1], sums[-1]))


def _signed_groups(scheme: Scheme, fn: ir.Function, kept: ir.Function) -> None:
    """Groups ``obs_plus``/``obs_minus`` (J+ and J− of every observable) when
    some observable subtracts: their Jacobians are taken apart and subtracted
    at the end (:func:`_observable_jacobian`), since the relative adjoints of
    J+ − J− divide by its value, which is exactly 0 at detailed balance."""
    parts = _observable_parts(scheme, fn)
    if any(minus is not None for _, minus in parts):
        zero = fn.graph.const(0)
        kept.add_group("obs_plus", [a if a is not None else zero for a, _ in parts])
        kept.add_group("obs_minus", [b if b is not None else zero for _, b in parts])


def _observable_jacobian(fn: ir.Function) -> ir.Function:
    """Add ``obs_jac`` (log form): directly, or as jac(J+) − jac(J−) when the
    observables subtract (the helper groups are dropped afterwards)."""
    from .simplify import differentiate

    if "obs_minus" not in fn.groups:
        return differentiate(fn, group="obs", log=True)
    fn = differentiate(fn, group="obs_plus", log=True)
    fn = differentiate(fn, group="obs_minus", log=True)
    g = fn.graph
    jac = [a if g.ops[b] == "const" and g.data[b] == 0 else g.sub(a, b)
           for a, b in zip(fn.group("obs_plus_jac"), fn.group("obs_minus_jac"))]
    out = ir.Function(g, fn.n_inputs, [], labels=fn.labels)
    for name in fn.groups:
        if name not in ("obs_plus", "obs_minus", "obs_plus_jac", "obs_minus_jac"):
            out.add_group(name, fn.group(name))
    out.add_group("obs_jac", jac)
    return ir.compact(out)


def _constant_weights(scheme: Scheme) -> list[list[float]]:
    """n_states × n_observables matrix of the weights that are numbers (the
    runtime's fast path); expression weights are carried by
    :func:`observable_trees` and leave 0 here."""
    index = scheme.index()
    terms = scheme.observable_terms()
    weights = [[0.0] * len(terms) for _ in scheme.states]
    for k, rows in enumerate(terms.values()):
        for state, label in rows:
            if label[0] == "num":
                weights[index[state]][k] += float(label[1])
    return weights


def observable_trees(scheme: Scheme) -> list:
    """Every observable term as plain data for the runtime (no compiler needed
    there): ``[observable index, state index, weight tree]``, the tree in the
    form of :func:`label_trees`."""
    index = scheme.index()
    column = {name: j for j, name in enumerate(scheme.symbols)}
    return [[k, index[state], _runtime_tree(label, column)]
            for k, rows in enumerate(scheme.observable_terms().values()) for state, label in rows]


def _simplify(fn: ir.Function, report: list | None) -> ir.Function:
    try:
        from .simplify import simplify
    except ImportError:
        return ir.compact(fn)
    return simplify(fn, report=report)


def _backend(name: str):
    if name not in BACKENDS:
        raise ModelError(f"unknown backend {name!r}; choose one of {', '.join(BACKENDS)}")
    return importlib.import_module(f"treeflux.compiler.backends.{name}")


def _kernel_name(name) -> str:
    """``compile_scheme(name=)`` as the ASCII stem the kernels are named by:
    user text never enters generated code (nor the cache key beyond it)."""
    if not isinstance(name, str):
        raise ModelError(f"compile_scheme: name must be a string, got {type(name).__name__}")
    return stem(name, fallback="treeflux_model")


def compile_scheme(scheme: Scheme, *, method: str = "auto", backend: str = "python",
                   jacobian: bool = False, log_jacobian: bool = False,
                   input_derivatives: str | None = None,
                   name: str = "treeflux_model", cache: bool = True) -> CompiledModel:
    """Compile a scheme into a :class:`CompiledModel`.

    Parameters
    ----------
    method : {"auto", "trees", "elimination", "equilibrium", "numeric"}
        Front end; ``auto`` decides from the structure (see :func:`plan`).
    backend : {"python", "c", "cython", "llvm"}
        Code generator for the straight-line kernel.
    jacobian : bool
        Also compile ∂p/∂θ for every symbol (``log_jacobian``: ∂p/∂log θ),
        and the same for the observables.
    input_derivatives : str, optional
        Name of one input: also compile the first and second derivatives of
        p (and of the observables) along it, for response-curve analysis.
    cache : bool
        Reuse (and store) the compiled model in the on-disk cache
        (:mod:`treeflux.compiler.artifacts`).
    """
    from . import artifacts
    # how another process compiles the same model (CompiledModel pickles as this)
    keywords = dict(method=method, backend=backend, jacobian=jacobian, log_jacobian=log_jacobian,
                    input_derivatives=input_derivatives, name=name, cache=cache)

    timings = {}
    back = _backend(backend)
    name = _kernel_name(name)
    scheme.validate()
    label_fn = _label_function(scheme)
    label_kernel = importlib.import_module("treeflux.compiler.backends.python").build(label_fn, name=f"{name}_rates")
    options = {"jacobian": jacobian, "log_jacobian": log_jacobian,
               "input_derivatives": input_derivatives, "name": name}
    if jacobian:
        options["jacobian_form"] = "log"  # compiled derivatives are log-form (runtime divides)
    key = artifacts.model_key(scheme, method=method, backend=backend, options=options)
    hit = artifacts.load(key) if cache else None
    if hit is not None:
        kernel, info, profile = hit
        profile["cache"] = "hit"
        return _with_recipe(_model(scheme, info, kernel, label_fn, label_kernel, profile), scheme, keywords)
    t0 = time.perf_counter()
    chosen = plan(scheme, method)
    timings["plan"] = time.perf_counter() - t0
    n = len(scheme.states)
    edges = scheme.edge_list()
    obs_names = tuple(scheme.observables)
    weights: list = [[0.0] * len(obs_names) for _ in range(n)]
    report: list = []
    deriv_report: list = []
    if chosen.method == "numeric":
        if jacobian or input_derivatives:
            raise ModelError(f"{scheme.origin}: derivatives need a straight-line method; this scheme "
                             f"is too large for one (elimination needs {chosen.reasons['elimination_flops']:,} flops)")
        kernel, groups = None, {}
        comps = _structure().terminal_components(n, edges)
        weights = _constant_weights(scheme)
        label_kernel = _rate_kernel(scheme, label_fn, name)
    else:
        t0 = time.perf_counter()
        fn, info = build(scheme, method=chosen.method, guard=True, order=chosen.order)
        comps = info.components
        timings["frontend"] = time.perf_counter() - t0
        kept = ir.Function(fn.graph, fn.n_inputs, [], labels=fn.labels)
        if "p" in fn.groups:
            kept.add_group("p", fn.group("p"))
            if obs_names:
                nodes, weights = _observable_nodes(scheme, fn)
                kept.add_group("obs", nodes)
                if jacobian:
                    _signed_groups(scheme, fn, kept)
        else:
            kept.add_group("basis", fn.group("basis"))
        t0 = time.perf_counter()
        fn = _simplify(kept, report)
        timings["simplify"] = time.perf_counter() - t0
        if jacobian or input_derivatives:
            fn = _derivatives(scheme, fn, jacobian=jacobian,
                              along=input_derivatives, timings=timings, report=deriv_report)
        t0 = time.perf_counter()
        compact = ir.compact(fn)
        kernel = back.build(compact, name=name, checks=_row_checks(scheme, fn.groups))
        timings["backend"] = time.perf_counter() - t0
        groups = dict(fn.groups)
    from .frontend import rates_may_be_negative

    sym = {s.name: s for s in scheme.parameters + scheme.inputs}
    info = ModelInfo(
        name=scheme.name, states=scheme.states,
        parameters=tuple(s.name for s in scheme.parameters),
        inputs=tuple(s.name for s in scheme.inputs),
        edges=edges, components=comps, groups=groups,
        observable_names=obs_names, observable_weights=weights,
        defaults=scheme.defaults(),
        bounds={k: (v.min, v.max) for k, v in sym.items()},
        method=chosen.method, backend=backend if kernel is not None else "numeric",
        log_jacobian=log_jacobian,
        tree_edges=max(len(c) - 1 for c in comps) if chosen.method == "trees" else 0,
        origin=str(scheme.origin), guarded=kernel is not None,
        signed_rates=rates_may_be_negative(scheme))
    profile = {"plan": chosen.reasons, "method": chosen.method, "passes": report,
               "derivative_passes": deriv_report, "timings": timings}
    if cache and kernel is not None:
        artifacts.store(key, kernel, info, profile)
    model = _with_recipe(_model(scheme, info, kernel, label_fn, label_kernel, profile), scheme, keywords)
    if kernel is None and chosen.numeric is not None:
        model.plan = chosen.numeric
    return model


def _rate_kernel(scheme: Scheme, label_fn: ir.Function, name: str):
    """The looped path's label kernel: the rates with every symbol checked
    against its floor and every rate for finiteness in the same pass (the
    lean steady_state of CompiledModel). Built with the C back end, like the
    looped kernel itself, whatever the model's back end (a cached library:
    LLVM's JIT took 1.3 s for Q6's 384 rates on every compile); on the numpy
    back end when no C compiler works."""
    from dataclasses import replace

    from treeflux.runtime.cache import CompileError

    checks = replace(_row_checks(scheme, {}), finite=(0, len(label_fn.outputs)))
    try:
        return _backend("c").build(label_fn, name=f"{name}_rates", checks=checks)
    except CompileError:
        return _backend("python").build(label_fn, name=f"{name}_rates", checks=checks)


def _row_checks(scheme: Scheme, groups: dict) -> RowChecks:
    """The checks fused into the runtime kernel: every symbol against its
    floor (:func:`treeflux.runtime.model.symbol_floors`), the row sum of each
    probability block (p, or one block per terminal component of the basis;
    none for the looped path's rate kernel, whose rates are to be finite
    instead), the observables finite."""
    params = tuple(s.name for s in scheme.parameters)
    names = params + tuple(s.name for s in scheme.inputs)
    bounds = {s.name: (s.min, s.max) for s in scheme.parameters + scheme.inputs}
    n = len(scheme.states)
    if "p" in groups:
        blocks = (groups["p"],)
    elif "basis" in groups:
        a, b = groups["basis"]
        blocks = tuple((k, k + n) for k in range(a, b, n))
    else:                                   # the rates of the looped path: no probability block
        blocks = ()
    return RowChecks(floors=symbol_floors(names, len(params), bounds), blocks=tuple(blocks),
                     finite=groups.get("obs", (0, 0)), tol=CompiledModel.ROW_SUM_TOL)


def _model(scheme, info: ModelInfo, kernel, label_fn: ir.Function, label_kernel, profile) -> CompiledModel:
    method = info.method
    info.label_trees = label_trees(scheme)
    info.observable_terms = observable_trees(scheme)
    return CompiledModel(info, kernel, label_kernel,
                         formula=lambda state, **kw: formula(scheme, state, method=method, **kw),
                         emitter=lambda target, out_dir: emit(scheme, target, out_dir, method=method),
                         profile=profile, rate_columns=_rate_columns(label_fn))


def _rate_columns(label_fn: ir.Function) -> tuple | None:
    """The symbol column of each edge's rate when every rate is a bare symbol
    and every symbol is some edge's rate (the looped path then hands X to its
    kernel unchanged, see CompiledModel); else None."""
    g = label_fn.graph
    nodes = label_fn.group("rates")
    if any(g.ops[v] != "input" for v in nodes):
        return None
    columns = tuple(int(g.data[v]) for v in nodes)
    return columns if set(columns) == set(range(label_fn.n_inputs)) else None


def _derivatives(scheme: Scheme, fn: ir.Function, *, jacobian: bool, along: str | None,
                 timings: dict, report: list) -> ir.Function:
    """Add derivative groups (``jac``, ``obs_jac``, ``d1``, ``d2``, ``obs_d1``, ``obs_d2``)."""
    from .simplify import differentiate, input_derivatives

    if "p" not in fn.groups:
        raise ModelError(f"{scheme.origin}: derivatives need a unique steady state "
                         f"(the scheme has several terminal components)")
    t0 = time.perf_counter()
    if jacobian:
        # Always the log form (relative adjoints: accurate on stiff rates);
        # the runtime divides by the symbol for the plain form.
        fn = differentiate(fn, group="p", log=True)
        if "obs" in fn.groups:
            fn = _observable_jacobian(fn)
    if along is not None:
        names = [s.name for s in scheme.inputs]
        if along not in names:
            raise ModelError(f"{scheme.origin}: input_derivatives names {along!r}, which is not an input "
                             f"(inputs: {', '.join(names) or 'none'})")
        fn = input_derivatives(fn, input=scheme.symbols.index(along), order=2)
    fn = _simplify(fn, report)
    timings["derivatives"] = time.perf_counter() - t0
    return fn


def label_trees(scheme: Scheme) -> list:
    """Every edge label as plain data for the runtime's multiprecision path:
    ``["num", "p/q"]``, ``["sym", column]``, ``[op, a]`` or ``[op, a, b]``."""
    column = {name: j for j, name in enumerate(scheme.symbols)}
    return [_runtime_tree(e.label, column) for e in scheme.edges]


def _runtime_tree(label, column: dict) -> list:
    op = label[0]
    if op == "num":
        return ["num", str(label[1])]
    if op == "sym":
        return ["sym", column[label[1]]]
    return [op, *(_runtime_tree(a, column) for a in label[1:])]


def _label_function(scheme: Scheme) -> ir.Function:
    from .frontend import lower_labels

    g = ir.Graph()
    labels = lower_labels(scheme, g)
    fn = ir.Function(g, len(scheme.symbols), [], labels=labels)
    fn.add_group("rates", labels)
    return ir.compact(fn)


def formula(scheme: Scheme, state: str, *, method: str = "elimination", expand: bool = False):
    """SymPy expression of ρ_state (the unnormalized steady-state weight).

    With ``expand`` (or for the tree method) it is the sum over spanning trees
    rooted at the state, refused above :data:`MAX_FORMULA_TREES` trees; else the
    nested elimination form x_state · Π_k d_k, equal to the tree sum exactly.
    """
    st = _structure()
    n = len(scheme.states)
    edges = scheme.edge_list()
    i = scheme.index()[state]
    if expand or method == "trees":
        # the float estimate first: exact big-integer counts only when they are small
        count = st.estimate_tree_counts(n, edges)[i] if n <= MAX_COUNT_STATES else None
        if count is not None and count <= 2 * MAX_FORMULA_TREES:
            count = st.tree_counts(n, edges)[i]
        if count is None or count > MAX_FORMULA_TREES:
            shown = ("too many to count" if count is None
                     else f"{count:,}" if isinstance(count, int) else f"about {count:.3g}")
            raise TooLargeError(f"{scheme.origin}: the expanded formula of {state!r} has {shown} tree terms "
                                f"(limit {MAX_FORMULA_TREES:,}); ask for the nested form (expand=False)")
        fn, info = build(scheme, method="trees", scale=False)
        node = fn.group("rho")[i]
        return ir.to_sympy(fn.graph, [node], scheme.symbols)[0]
    cost = _elimination_cost(n, edges, st.terminal_components(n, edges), budget=MAX_SYMBOLIC_OPS)
    flops = cost.flops
    if flops > MAX_FORMULA_OPS:
        raise TooLargeError(f"{scheme.origin}: the nested closed form needs {'about' if cost.complete else 'more than'} {flops:,} operations "
                            f"(limit {MAX_FORMULA_OPS:,}); evaluate the scheme numerically instead")
    fn, info = build(scheme, method="elimination")
    rho = fn.group("rho")
    comp_index = next((c for c, comp in enumerate(info.components) if i in comp), None)
    if comp_index is None:
        import sympy
        return sympy.Integer(0)
    pivots = info.pivots[comp_index] if info.pivots else []
    g = fn.graph
    node = g.mul(rho[i], *pivots) if pivots else rho[i]
    return ir.to_sympy(g, [node], scheme.symbols)[0]


def emit(scheme: Scheme, target: str, out_dir, *, method: str = "auto") -> list[Path]:
    """Write standalone source for ``target`` into ``out_dir``; returns the paths."""
    back = _backend(target)
    chosen = plan(scheme, method)
    if chosen.method == "numeric" and target == "c" and method == "auto" \
            and chosen.reasons["elimination_flops"] <= MAX_EMIT_C_OPS:
        # Standalone C has no looped path to fall back on: the body, in
        # parts of vector statements, compiles in well under a minute here.
        chosen = plan(scheme, "elimination")
    if chosen.method == "numeric":
        raise TooLargeError(f"{scheme.origin}: too large for straight-line source "
                            f"({chosen.reasons['elimination_flops']:,} flops; C takes up to "
                            f"{MAX_EMIT_C_OPS:,}); evaluate it with treeflux (the looped numeric path)")
    fn, iface = _emit_function(scheme, method=chosen.method, checks=target in ("python", "c", "cython"))
    name = stem(scheme.name)
    files = dict(back.emit(fn, name=name, interface=iface) if target in ("python", "c", "cython")
                 else back.emit(fn, name=name))
    if hasattr(back, "embed_example"):
        files.update(back.embed_example(fn, name=name, interface=iface))
    # The same names as data, for tools that read the layout rather than the code.
    layout = {"scheme": scheme.name, "symbols": list(scheme.symbols),
              "defaults": scheme.defaults(), "observables": list(scheme.observables),
              "outputs": {g: list(iface.outputs[a:b]) for g, (a, b) in iface.groups.items()},
              "note": "outputs are model predictions of the scheme, not measurements"}
    files[f"{name}.layout.json"] = json.dumps(layout, indent=2, sort_keys=True) + "\n"
    from treeflux.runtime.safe_io import write_files
    out = Path(out_dir)
    try:
        out.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        from treeflux.runtime.safe_io import OutputError
        raise OutputError(f"cannot write into {out}: {exc.strerror or exc}") from None
    return write_files({out / fname: files[fname] for fname in sorted(files)})  # all or nothing


def _emit_function(scheme: Scheme, *, method: str, checks: bool):
    """The Function an emitted file evaluates and the model :class:`Interface`
    around it: outputs ``p`` (or ``basis``), then ``obs`` (the observables,
    with a unique steady state), then with ``checks`` the distinct edge
    labels (rates) that emitted code checks per row and does not write out."""
    fn, _ = build(scheme, method=method)
    kept = ir.Function(fn.graph, fn.n_inputs, [], labels=fn.labels)
    key = "p" if "p" in fn.groups else "basis"
    kept.add_group(key, fn.group(key))
    n = len(scheme.states)
    outputs = list(scheme.states) if key == "p" else \
        [f"{c}:{st}" for c in range(len(fn.group(key)) // max(1, n)) for st in scheme.states]
    if key == "p" and scheme.observables:
        nodes, _ = _observable_nodes(scheme, fn)
        kept.add_group("obs", nodes)
        outputs += list(scheme.observables)
    if checks:
        kept.add_group("rates", list(dict.fromkeys(fn.labels)))
    fn = ir.compact(_simplify(kept, None))
    groups = {g: ab for g, ab in fn.groups.items() if g != "rates"}
    n_checks = 0
    if checks:
        a, b = fn.groups["rates"]
        if b != len(fn.outputs):
            raise AssertionError("emit: the rate checks must be the last outputs")
        n_checks = b - a
    defaults = scheme.defaults()
    iface = Interface(model=scheme.name, states=tuple(scheme.states), symbols=tuple(scheme.symbols),
                      defaults=tuple(float(defaults.get(s, float("nan"))) for s in scheme.symbols),
                      observables=tuple(scheme.observables) if "obs" in groups else (),
                      groups=groups, outputs=tuple(outputs), checks=n_checks)
    return fn, iface


def _with_recipe(model: CompiledModel, scheme: Scheme, keywords: dict) -> CompiledModel:
    """Give ``model`` its rebuild recipe: a snapshot of the scheme as data (later
    edits to the scheme do not change it) and the keywords of :func:`compile_scheme`."""
    model.recipe = (rebuild_model, (pickle.dumps(scheme, protocol=pickle.HIGHEST_PROTOCOL), keywords))
    return model


_REBUILT: dict = {}  # models rebuilt in this process by unpickling, by content


def rebuild_model(scheme: bytes, keywords: dict) -> CompiledModel:
    """Compile a pickled scheme with ``keywords`` (those of :func:`compile_scheme`)
    once per process: what an unpickled CompiledModel becomes (Dask workers). The
    scheme travels as data (states, edges, parsed labels); the compile goes
    through the cache."""
    key = hashlib.sha256(scheme + json.dumps(keywords, sort_keys=True).encode()).hexdigest()
    model = _REBUILT.get(key)
    if model is None:
        while len(_REBUILT) >= 16:
            _REBUILT.pop(next(iter(_REBUILT)))
        model = _REBUILT[key] = compile_scheme(pickle.loads(scheme), **keywords)
    return model
