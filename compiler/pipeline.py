"""The compile pipeline: scheme → plan → front end → IR passes → back end.

:func:`plan` decides the method from the structure (exact tree counts, the
flop count of elimination under the fill-reducing order, detailed balance)
and refuses requests that would exhaust memory or time, before any work.
:func:`compile_scheme` runs the stages and returns a
:class:`~treeflux.runtime.model.CompiledModel`.
"""

from __future__ import annotations

import importlib
import json
import time
from dataclasses import dataclass, field
from pathlib import Path

from treeflux.runtime.model import CompiledModel, ModelInfo
from treeflux.runtime.safe_io import write_files

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
# Detailed-balance checks run SymPy per basis cycle; skipped beyond this.
MAX_BALANCE_CYCLES = 400
# formula(expand=True) lists trees only up to this many per state.
MAX_FORMULA_TREES = 20_000
# The nested closed form is built only up to this many elimination flops.
MAX_FORMULA_OPS = 50_000


@dataclass
class Plan:
    method: str
    reasons: dict = field(default_factory=dict)
    numeric: object = None  # the EliminationPlan of the whole scheme, when it is one component


def _structure():
    from . import structure
    return structure


def plan(scheme: Scheme, method: str = "auto") -> Plan:
    """Choose (or check) the method, with the numbers that led to the choice."""
    if method not in METHODS:
        raise ModelError(f"unknown method {method!r}; choose one of {', '.join(METHODS)}")

    st = _structure()
    scheme.validate()
    n = len(scheme.states)
    edges = scheme.edge_list()
    comps = st.terminal_components(n, edges)
    reasons: dict = {"states": n, "edges": len(edges), "terminal_components": len(comps)}
    tree_factors = None
    if n <= MAX_COUNT_STATES:
        counts = st.tree_counts(n, edges)
        tree_factors = sum(c * (len(comp) - 1) for comp in comps for c in (counts[i] for i in comp))
        reasons["tree_factors"] = tree_factors
    flops, fill, whole = _elimination_cost(n, edges, comps)
    reasons["elimination_flops"] = flops
    reasons["fill"] = fill
    if not st.is_reversible(n, edges):
        balance = False  # a one-way edge can never be balanced
    elif len(edges) // 2 - n + 1 <= MAX_BALANCE_CYCLES:
        balance = st.detailed_balance(scheme)["verdict"]
    else:
        # Too many cycles for SymPy: exact test at random rational points.
        balance = st.balanced_at_random_points(scheme)
        reasons["detailed_balance_test"] = "exact at random rational points (Schwartz-Zippel)" 
    reasons["detailed_balance"] = balance
    reasons["limits"] = {"straight_line_ops": STRAIGHT_LINE_LIMIT, "tree_factors": MAX_TREE_FACTORS,
                         "symbolic_ops": MAX_SYMBOLIC_OPS}

    if method == "auto":
        if balance is True and len(comps) == 1 and 3 * n <= STRAIGHT_LINE_LIMIT:
            chosen = "equilibrium"
        elif tree_factors is not None and tree_factors <= min(flops, 400):
            chosen = "trees"
        elif flops <= STRAIGHT_LINE_LIMIT or len(comps) > 1:
            chosen = "elimination"
        else:
            chosen = "numeric"
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
        return Plan(chosen, reasons, whole)
    if method == "trees":
        if tree_factors is None or tree_factors > MAX_TREE_FACTORS:
            shown = "more than can be counted here" if tree_factors is None else f"{tree_factors:,}"
            raise TooLargeError(f"{scheme.origin}: tree enumeration needs {shown} tree factors "
                                f"(limit {MAX_TREE_FACTORS:,}); use method='elimination' "
                                f"({flops:,} flops) or 'numeric'")
    elif method == "elimination":
        if flops > MAX_SYMBOLIC_OPS:
            raise TooLargeError(f"{scheme.origin}: symbolic elimination needs about {flops:,} operations "
                                f"(limit {MAX_SYMBOLIC_OPS:,}); use method='numeric'")
    elif method == "equilibrium":
        if balance is not True:
            raise ModelError(f"{scheme.origin}: method 'equilibrium' needs detailed balance to hold "
                             f"identically; it is {balance!r} here (see `treeflux profile`)")
    elif method == "numeric" and len(comps) > 1:
        raise ModelError(f"{scheme.origin}: the numeric path needs one terminal component; "
                         f"this scheme has {len(comps)}")
    return Plan(method, reasons, whole)


def _elimination_cost(n: int, edges, comps):
    """(flops, fill, plan of the whole scheme or None) of elimination with the
    fill-reducing order, summed over the terminal components."""
    from treeflux.runtime.numeric import EliminationPlan

    flops = fill = 0
    whole = None
    for comp in comps:
        local = {s: a for a, s in enumerate(comp)}
        sub = [(local[i], local[j]) for i, j in edges if i in local and j in local]
        if len(comp) > 1:
            p = EliminationPlan(len(comp), sub)
            flops += p.flops
            fill += p.fill
            if len(comp) == n:
                whole = p
    return flops, fill, whole


def _observable_nodes(scheme: Scheme, fn: ir.Function) -> tuple[list[int], list[list[float]]]:
    g = fn.graph
    index = scheme.index()
    p = fn.group("p")
    nodes, weights = [], [[0.0] * len(scheme.observables) for _ in scheme.states]
    for k, (name, w) in enumerate(scheme.observables.items()):
        terms = []
        for state, weight in w.items():
            weights[index[state]][k] = weight
            if weight == 1:
                terms.append(p[index[state]])
            elif weight != 0:
                terms.append(g.mul(g.const(weight), p[index[state]]))
        nodes.append(g.add(*terms) if terms else g.const(0))
    return nodes, weights


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

    timings = {}
    back = _backend(backend)
    name = _kernel_name(name)
    scheme.validate()
    label_fn = _label_function(scheme)
    label_kernel = importlib.import_module("treeflux.compiler.backends.python").build(label_fn, name=f"{name}_rates")
    options = {"jacobian": jacobian, "log_jacobian": log_jacobian, "jacobian_form": "log",
               "input_derivatives": input_derivatives, "name": name}
    key = artifacts.model_key(scheme, method=method, backend=backend, options=options)
    hit = artifacts.load(key) if cache else None
    if hit is not None:
        kernel, info, profile = hit
        profile["cache"] = "hit"
        return _model(scheme, info, kernel, label_kernel, profile)
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
        for k, w in enumerate(scheme.observables.values()):
            for state, weight in w.items():
                weights[scheme.index()[state]][k] = weight
    else:
        t0 = time.perf_counter()
        fn, info = build(scheme, method=chosen.method,
                         order=chosen.numeric.order if chosen.numeric is not None else None)
        comps = info.components
        timings["frontend"] = time.perf_counter() - t0
        kept = ir.Function(fn.graph, fn.n_inputs, [], labels=fn.labels)
        if "p" in fn.groups:
            kept.add_group("p", fn.group("p"))
            if obs_names:
                nodes, weights = _observable_nodes(scheme, fn)
                kept.add_group("obs", nodes)
        else:
            kept.add_group("basis", fn.group("basis"))
        t0 = time.perf_counter()
        fn = _simplify(kept, report)
        timings["simplify"] = time.perf_counter() - t0
        if jacobian or input_derivatives:
            fn = _derivatives(scheme, fn, jacobian=jacobian,
                              along=input_derivatives, timings=timings, report=deriv_report)
        t0 = time.perf_counter()
        kernel = back.build(ir.compact(fn), name=name)
        timings["backend"] = time.perf_counter() - t0
        groups = dict(fn.groups)
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
        tree_edges=max(len(c) - 1 for c in comps) if chosen.method == "trees" else 0)
    profile = {"plan": chosen.reasons, "method": chosen.method, "passes": report,
               "derivative_passes": deriv_report, "timings": timings}
    if cache and kernel is not None:
        artifacts.store(key, kernel, info, profile)
    model = _model(scheme, info, kernel, label_kernel, profile)
    if kernel is None and chosen.numeric is not None:
        model.plan = chosen.numeric
    return model


def _model(scheme, info: ModelInfo, kernel, label_kernel, profile) -> CompiledModel:
    method = info.method
    info.label_trees = label_trees(scheme)
    return CompiledModel(info, kernel, label_kernel,
                         formula=lambda state, **kw: formula(scheme, state, method=method, **kw),
                         emitter=lambda target, out_dir: emit(scheme, target, out_dir, method=method),
                         profile=profile)


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
            fn = differentiate(fn, group="obs", log=True)
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

    def convert(label):
        op = label[0]
        if op == "num":
            return ["num", str(label[1])]
        if op == "sym":
            return ["sym", column[label[1]]]
        return [op, *(convert(a) for a in label[1:])]

    return [convert(e.label) for e in scheme.edges]


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
        count = st.tree_counts(n, edges)[i] if n <= MAX_COUNT_STATES else None
        if count is None or count > MAX_FORMULA_TREES:
            shown = "too many to count" if count is None else f"{count:,}"
            raise TooLargeError(f"{scheme.origin}: the expanded formula of {state!r} has {shown} tree terms "
                                f"(limit {MAX_FORMULA_TREES:,}); ask for the nested form (expand=False)")
        fn, info = build(scheme, method="trees", scale=False)
        node = fn.group("rho")[i]
        return ir.to_sympy(fn.graph, [node], scheme.symbols)[0]
    flops = _elimination_cost(n, edges, st.terminal_components(n, edges))[0]
    if flops > MAX_FORMULA_OPS:
        raise TooLargeError(f"{scheme.origin}: the nested closed form needs about {flops:,} operations "
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
