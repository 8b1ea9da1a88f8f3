"""`treeflux profile`: structure, method choice, operation counts, phase timings."""

from __future__ import annotations

import time

from . import ir
from .frontend import build
from .model import Scheme
from .pipeline import MAX_COUNT_STATES, _simplify, plan

# Derivative op counts are profiled for value bodies up to this size.
DERIVATIVE_PROFILE_LIMIT = 2_000


def profile(scheme: Scheme, *, method: str = "auto") -> dict:
    """A JSON-ready profile of the scheme (see DESIGN.md for the fields)."""
    from . import structure as st

    timings = {}
    t0 = time.perf_counter()
    scheme.validate()
    n = len(scheme.states)
    edges = scheme.edge_list()
    names = scheme.states
    sccs = st.strongly_connected_components(n, edges)
    terms = st.terminal_components(n, edges)
    reversible = st.is_reversible(n, edges)
    timings["structure"] = time.perf_counter() - t0
    t0 = time.perf_counter()
    if n <= MAX_COUNT_STATES:
        counts = st.tree_counts(n, edges)
        trees = {names[i]: str(c) for i, c in enumerate(counts)}
    else:
        trees = None
    timings["tree_counts"] = time.perf_counter() - t0
    t0 = time.perf_counter()
    chosen = plan(scheme, method)
    timings["plan"] = time.perf_counter() - t0
    balance = chosen.reasons.get("detailed_balance")
    out = {
        "name": scheme.name,
        "states": list(names),
        "edges": len(edges),
        "symbols": list(scheme.symbols),
        "implicit_symbols": scheme.implicit_symbols,
        "strongly_connected": len(sccs) == 1,
        "terminal_components": [[names[i] for i in c] for c in terms],
        "reversible": reversible,
        "detailed_balance": balance,
        "trees": trees,
        "method": chosen.method,
        "plan": chosen.reasons,
    }
    if balance == "conditional" or balance is False:
        db = st.detailed_balance(scheme)
        out["detailed_balance_conditions"] = db.get("conditions", [])
        out["detailed_balance_reason"] = db.get("reason", "")
    if scheme.implicit_symbols:
        out["note"] = "no symbols declared: every name in a rate is taken as a parameter"
    if trees is None:
        out["trees_note"] = f"exact tree counts are computed up to {MAX_COUNT_STATES} states"
    if chosen.method != "numeric":
        t0 = time.perf_counter()
        fn, info = build(scheme, method=chosen.method,
                         order=chosen.numeric.order if chosen.numeric is not None else None)
        timings["frontend"] = time.perf_counter() - t0
        key = "p" if "p" in fn.groups else "basis"
        kept = ir.Function(fn.graph, fn.n_inputs, [], labels=fn.labels)
        kept.add_group(key, fn.group(key))
        before = ir.count_ops(kept.graph, kept.outputs)
        report: list = []
        t0 = time.perf_counter()
        simple = _simplify(kept, report)
        timings["simplify"] = time.perf_counter() - t0
        out["operations"] = ir.count_ops(simple.graph, simple.outputs)
        out["operations_before_simplify"] = before
        out["passes"] = report
        out["fill"] = info.fill
        if key == "p" and out["operations"]["total"] <= DERIVATIVE_PROFILE_LIMIT:
            from .simplify import differentiate
            t0 = time.perf_counter()
            jac = differentiate(simple, group="p")
            deriv_report: list = []
            jac = _simplify(jac, deriv_report)
            timings["derivatives"] = time.perf_counter() - t0
            jac_ops = ir.count_ops(jac.graph, jac.group("jac"))
            out["derivative_operations"] = jac_ops
            out["derivative_operations_per_state_row"] = round(jac_ops["total"] / len(names), 1)
            out["derivative_passes"] = deriv_report
    else:
        out["operations"] = {"total": chosen.reasons["elimination_flops"], "looped": True}
        out["fill"] = chosen.reasons["fill"]
    out["timings_s"] = {k: round(v, 6) for k, v in timings.items()}
    return out
