"""`treeflux profile`: structure, method choice, operation counts, phase timings."""

from __future__ import annotations

import math
import time

from . import ir
from .frontend import build
from .model import Scheme
from .errors import TooLargeError
from .pipeline import MAX_COUNT_STATES, _elimination_cost, _simplify, plan

# Derivative op counts are profiled for value bodies up to this size.
DERIVATIVE_PROFILE_LIMIT = 2_000
# Exact tree counts (Bareiss on big integers) cost about flops × (1 + digits/100)
# word operations (measured here: a 400-state random graph of out-degree 8,
# 6.2 million flops and 359-digit counts, took 13 s; Q8, 0.9 million flops and
# 221 digits, 1.7 s); they are computed up to this much work.
EXACT_COUNT_WORK = 3_000_000


def _scientific(log10_value: float) -> str:
    """A count given by its log10 as text, e.g. 358.2 → "1.58e358"; "0" for -inf."""
    if log10_value == -math.inf:
        return "0"
    exponent = math.floor(log10_value)
    return f"{10 ** (log10_value - exponent):.3g}e{exponent}"


def _tree_counts(n, edges, names) -> tuple[dict | None, str | None, dict | None]:
    """(exact counts, reason when skipped, estimates as text when skipped)."""
    from . import structure as st

    if n > MAX_COUNT_STATES:
        return None, f"exact tree counts are computed up to {MAX_COUNT_STATES} states", None
    logs = st.estimate_tree_counts(n, edges, log10=True)
    top = max(logs)
    digits = top + 1 if top > 0 else 1
    flops = _elimination_cost(n, edges, [list(range(n))], budget=EXACT_COUNT_WORK).flops \
        if len(st.terminal_components(n, edges)) == 1 else 0
    work = flops * (1 + digits / 100)
    if work > EXACT_COUNT_WORK:
        shown = {names[i]: _scientific(c) for i, c in enumerate(logs)}
        return None, (f"exact tree counts skipped: counts of about {digits:.0f} digits over "
                      f"{flops:,}{'+' if flops > EXACT_COUNT_WORK else ''} elimination steps are beyond the "
                      f"exact-count budget; trees_estimate gives floating estimates"), shown
    counts = st.tree_counts(n, edges)
    return {names[i]: str(c) for i, c in enumerate(counts)}, None, None


def profile(scheme: Scheme, *, method: str = "auto") -> dict:
    """A JSON-ready profile of the scheme (see DESIGN.md for the fields)."""
    from . import structure as st

    timings = {}
    t0 = time.perf_counter()
    scheme.validate()
    n = len(scheme.states)
    edges = scheme.edge_list()
    names = scheme.states
    from treeflux.runtime import graph
    sccs = graph.strongly_connected_components(n, edges)   # edges valid: no re-checking
    terms = graph.terminal_components(n, edges)
    present = set(edges)
    reversible = all((j, i) in present for i, j in edges)
    timings["structure"] = time.perf_counter() - t0
    t0 = time.perf_counter()
    trees, trees_note, trees_estimate = _tree_counts(n, edges, names)
    timings["tree_counts"] = time.perf_counter() - t0
    t0 = time.perf_counter()
    try:
        chosen = plan(scheme, method)
    except TooLargeError as exc:
        if method != "auto":
            raise
        chosen = None
        refusal = str(exc)
    timings["plan"] = time.perf_counter() - t0
    if chosen is None:
        # Profiled, not compiled: the structure and the estimate that refused every method.
        return _refused_profile(scheme, sccs, terms, reversible, trees, trees_note, trees_estimate,
                                refusal, timings)
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
        db = st.detailed_balance(scheme)        # bounded: symbolic only for few, short cycles
        out["detailed_balance_conditions"] = db.get("conditions", [])
        out["detailed_balance_reason"] = db.get("reason", "")
    if scheme.implicit_symbols:
        out["note"] = "no symbols declared: every name in a rate is taken as a parameter"
    if trees is None:
        out["trees_note"] = trees_note
        if trees_estimate is not None:
            out["trees_estimate"] = trees_estimate
    if chosen.method != "numeric":
        t0 = time.perf_counter()
        fn, info = build(scheme, method=chosen.method, order=chosen.order)
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


def _refused_profile(scheme, sccs, terms, reversible, trees, trees_note, trees_estimate, refusal,
                     timings) -> dict:
    """The profile of a scheme no method can compile here: structure, counts and the refusal."""
    from . import structure as st

    names = scheme.states
    out = {
        "name": scheme.name,
        "states": list(names),
        "edges": len(scheme.edge_list()),
        "symbols": list(scheme.symbols),
        "implicit_symbols": scheme.implicit_symbols,
        "strongly_connected": len(sccs) == 1,
        "terminal_components": [[names[i] for i in c] for c in terms],
        "reversible": reversible,
        "detailed_balance": st.detailed_balance(scheme)["verdict"] if reversible else False,
        "trees": trees,
        "method": None,
        "refused": refusal,
        "operations": None,
    }
    if trees is None:
        out["trees_note"] = trees_note
        if trees_estimate is not None:
            out["trees_estimate"] = trees_estimate
    out["timings_s"] = {k: round(v, 6) for k, v in timings.items()}
    return out
