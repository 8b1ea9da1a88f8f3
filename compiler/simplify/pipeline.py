"""The simplifier: the passes in their fixed order.

1. :func:`canonical` — flatten unshared nested sums/products, sort
   commutative operands; hash-consing then merges equal subexpressions.
2. :func:`fold` — exact constant folding and neutral elements.
3. :func:`factor` — greedy multivariate Horner on sums of products, pair CSE.
4. :func:`normalize` — one reciprocal per shared denominator.
5. :func:`~treeflux.compiler.ir.compact` — dead-row removal.

Every pass preserves the value of every output exactly (in the rationals) and
introduces no subtraction.
"""

from __future__ import annotations

from treeflux.runtime.progress import progress

from ..ir import Function, compact, count_ops, verify
from .canonical import canonical
from .factor import factor
from .fold import fold
from .normalize import normalize
from .rewrite import value_roots

PASSES = (("canonical", canonical), ("fold", fold), ("factor", factor),
          ("normalize", normalize), ("compact", compact))


def simplify(fn: Function, *, report=None, check: bool = False, passes=None) -> Function:
    """Run the simplifier passes in their fixed order.

    Parameters
    ----------
    fn : Function
        Output of a front end (not modified).
    report : list, optional, keyword-only
        If a list, one dict per pass is appended:
        ``{"pass": name, "before": count_ops(values), "after": count_ops(values)}``
        where values are the groups ``p``, ``basis`` and ``obs`` present.
    check : bool, keyword-only
        Run :func:`treeflux.compiler.ir.verify` after every pass (for tests).
    passes : sequence of str, optional, keyword-only
        Names of the passes to run (in the fixed order); default all.

    Returns
    -------
    Function
        Compacted, with the same groups, outputs and labels.
    """
    names = [name for name, _ in PASSES]
    if passes is not None:
        unknown = [p for p in passes if p not in names]
        if unknown:
            raise ValueError(f"unknown simplifier pass {unknown[0]!r}; choose from {', '.join(names)}")
    if check:
        verify(fn)
    chosen = [(name, run) for name, run in PASSES if passes is None or name in passes]
    with progress("simplification", total=len(chosen), unit="pass") as bar:
        for name, run in chosen:
            bar.set_postfix_str(name)
            before = count_ops(fn.graph, value_roots(fn)) if isinstance(report, list) else None
            fn = run(fn)
            if check:
                verify(fn)
            if isinstance(report, list):
                report.append({"pass": name, "before": before, "after": count_ops(fn.graph, value_roots(fn))})
            bar.update(1)
    if passes is not None and "compact" not in passes:
        fn = compact(fn)
    return fn
