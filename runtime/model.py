"""CompiledModel: what a compiled scheme offers at run time.

A CompiledModel holds a compiled kernel (any back end) that maps rows of
symbol values to its outputs (steady state, observables, derivatives), a
small numpy kernel for the edge rates, and the metadata to read both. It
validates inputs (shape, finiteness, the sign rule of each symbol: a declared
min below zero lets a symbol be negative), broadcasts dictionaries, and
guards every output through one function, :meth:`CompiledModel._guarded`:
the straight-line kernels carry an exact range test of the labels folded
into their normaliser (see ``treeflux.compiler.frontend.guard_factor``), so a
row whose intermediates could underflow, a zero rate (an absent edge) or a
non-finite value makes its row sum differ from 1. Such rows are recomputed by
the looped subtraction-free elimination of :mod:`treeflux.runtime.numeric`
(steady_state, observables, basis) or refused (input_derivatives). Rates
that evaluate negative, NaN or infinite are refused with the file, the row and
the edge by its state names.

Kernels built by the compiler check every row themselves (the symbols
against their floors, the row sums, the observables: one status byte per row,
see :class:`treeflux.runtime.kernel.RowChecks`), so a call makes one pass
over X; Python looks at the status only when rows were flagged, and those
rows take the same refusals and recomputations as the separate numpy checks
the models of signed rates (and ``_use_fused = False``) still run.

All values are model predictions of the scheme, not measurements.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from .errors import EvaluationError
from .kernel import BAD_SYMBOL, NOT_FINITE, NOT_PROBABILITY, Kernel, check_threads

_F64 = np.dtype(np.float64)


def _plain(X, width: int) -> bool:
    """X is what the kernels read as is: a C-contiguous float64 (N, width) ndarray."""
    return (type(X) is np.ndarray and X.dtype is _F64 and X.ndim == 2 and X.shape[1] == width
            and X.flags.c_contiguous)


@dataclass
class ModelInfo:
    """Metadata a CompiledModel needs; filled in by the compiler."""

    name: str
    states: tuple
    parameters: tuple
    inputs: tuple
    edges: list                       # (source index, target index), edge order
    components: list                  # terminal components (lists of state indices)
    groups: dict                      # output group → (start, stop)
    observable_names: tuple = ()
    observable_weights: list = field(default_factory=list)  # n_states rows × n_observables
    defaults: dict = field(default_factory=dict)
    bounds: dict = field(default_factory=dict)  # name → (min or None, max or None)
    method: str = ""
    backend: str = ""
    log_jacobian: bool = False
    tree_edges: int = 0  # trees method: edges per tree (n−1); guards underflow (kernels without guard)
    origin: str = ""     # the model file (or "scheme"): named in every error
    guarded: bool = False        # p carries the in-kernel range guard (frontend.guard_factor)
    signed_rates: bool = False   # some rate may evaluate negative: rates are checked per row
    # One label tree per edge for the multiprecision derivative path
    # (runtime.sensitivity): ["num", "p/q"], ["sym", column], [op, a(, b)].
    label_trees: list = field(default_factory=list)
    # Observables as Σ_i p_i·w_ik(θ): [observable index, state index, weight
    # tree] (trees as label_trees); evaluated per row on every path.
    observable_terms: list = field(default_factory=list)


class CompiledModel:
    """A compiled steady-state function of a kinetic scheme.

    Parameters are given as an (N, len(symbols)) array in :attr:`symbols`
    order, or as a dict name → scalar or (N,) array (missing names take the
    model file's values). Symbols must be finite; parameters positive and
    inputs (concentrations) non-negative unless their declared min is below
    zero. Evaluated rates must be positive and finite (zero: an absent edge).
    """

    def __init__(self, info: ModelInfo, kernel: Kernel | None, label_kernel: Kernel, *,
                 formula=None, emitter=None, profile=None, rate_columns=None):
        self.info = info
        self.kernel = kernel
        self.label_kernel = label_kernel
        # The looped path's lean call (kernel None, one terminal component):
        # when every rate is a bare symbol and every symbol a rate, column e
        # of the rates is column rate_columns[e] of X (None otherwise).
        self._rate_columns = (None if rate_columns is None or kernel is not None
                              or len(info.components) != 1 else np.asarray(rate_columns, dtype=np.intp))
        self._rates_are_X = (self._rate_columns is not None
                             and np.array_equal(self._rate_columns, np.arange(len(self._rate_columns))))
        # otherwise a label kernel with the fused symbol checks serves the lean call
        self._rate_kernel = (label_kernel if kernel is None and len(info.components) == 1
                             and getattr(label_kernel, "checked", None) is not None else None)
        self._formula = formula
        self._emitter = emitter
        self.plan = None  # EliminationPlan of the looped numeric path, built on first use
        self._zero_plans: dict = {}  # plans for rows whose zero rates remove edges
        self.profile = profile or {}
        # The fused path: the kernel checks every row itself (see _guarded).
        # Signed-rate models keep the checks in Python (their rates are
        # checked from the label kernel before the steady-state kernel runs).
        self._fusable = (kernel is not None and getattr(kernel, "checked", None) is not None
                         and info.guarded and not info.signed_rates)
        n_out = kernel.n_outputs if kernel is not None else -1
        # steady_state's lean path: p is the kernel's whole output
        self._lean = (kernel, len(self.symbols), n_out) if (
            self._fusable and len(info.components) == 1 and tuple(info.groups.get("p", ())) == (0, n_out)
        ) else None

    #: Private switch (tests): False runs the checks as separate numpy passes
    #: before and after the raw kernel, as before the checks moved into the kernels.
    _use_fused = True

    @property
    def _fused(self) -> bool:
        return self._fusable and self._use_fused

    # ------------------------------------------------------------ metadata
    @property
    def states(self) -> tuple:
        return tuple(self.info.states)

    @property
    def symbols(self) -> tuple:
        return tuple(self.info.parameters) + tuple(self.info.inputs)

    @property
    def observable_names(self) -> tuple:
        return tuple(self.info.observable_names)

    @property
    def method(self) -> str:
        return self.info.method

    @property
    def backend(self) -> str:
        return self.info.backend

    def __repr__(self):
        return (f"<CompiledModel {self.info.name!r}: {len(self.states)} states, "
                f"{len(self.symbols)} symbols, method={self.method}, backend={self.backend}>")

    # ------------------------------------------------------------ inputs
    def as_array(self, X) -> np.ndarray:
        """Validate and convert inputs to a C-contiguous (N, n_symbols) float64 array.

        Accepted: real numbers (float or integer arrays, Python numbers). Refused
        with an :class:`EvaluationError`: complex, boolean, string, object and
        masked arrays, strings and booleans in a dict, numbers beyond float64."""
        arr = self._convert(X)
        self._check(arr)
        return arr

    def _input(self, X) -> np.ndarray:
        """``X`` for a checked evaluation: converted only when the kernel
        checks the symbols itself (:meth:`_guarded` refuses a flagged row with
        :meth:`_check`'s message), else converted and checked."""
        return self._convert(X) if self._fused else self.as_array(X)

    def _convert(self, X) -> np.ndarray:
        """:meth:`as_array` without the symbol checks."""
        if _plain(X, len(self.info.parameters) + len(self.info.inputs)):
            return X
        syms = self.symbols
        if isinstance(X, dict):
            unknown = [k for k in X if k not in syms]
            if unknown:
                raise EvaluationError(f"unknown symbol {_shown(unknown[0])}; the model's symbols are "
                                      f"{', '.join(syms)}")
            cols = []
            for s in syms:
                if s in X:
                    v = _real_array(X[s], f"symbol {s!r}")
                elif s in self.info.defaults:
                    v = np.asarray(self.info.defaults[s], dtype=np.float64)
                else:
                    raise EvaluationError(f"symbol {s!r} has no value: pass it or give it a value in the model")
                if v.ndim > 1:
                    raise EvaluationError(f"symbol {s!r}: expected a scalar or a 1-d array, got shape {v.shape}")
                cols.append(v)
            try:
                cols = np.broadcast_arrays(*[np.atleast_1d(c) for c in cols])
            except ValueError:
                shapes = {s: np.shape(c) for s, c in zip(syms, cols) if np.ndim(c)}
                raise EvaluationError(f"arrays of different lengths cannot be broadcast: {shapes}") from None
            arr = np.ascontiguousarray(np.stack(cols, axis=1)) if cols else np.zeros((1, 0))
        else:
            arr = _real_array(X, "inputs")
            if arr.ndim == 1 and arr.shape[0] == len(syms):
                arr = arr[None, :]
            if arr.ndim != 2 or arr.shape[1] != len(syms):
                raise EvaluationError(f"expected an (N, {len(syms)}) array of symbol values "
                                      f"({', '.join(syms)}), got shape {arr.shape}")
            arr = np.ascontiguousarray(arr)
        return arr

    def _check(self, arr: np.ndarray) -> None:
        n_par = len(self.info.parameters)
        if arr.size == 0 or self._quick_ok(arr, n_par):
            return
        finite = np.isfinite(arr)
        if not finite.all():
            r, c = np.argwhere(~finite)[0]
            raise EvaluationError(f"{self._where()}row {r}: symbol {self.symbols[c]!r} is not finite "
                                  f"({float(arr[r, c])})")
        for c, name in enumerate(self.symbols):
            low, strict = self._symbol_floor(c, n_par)
            col = arr[:, c]
            bad = (col <= low) if strict else (col < low)
            if bad.any():
                r = int(np.argmax(bad))
                kind = "parameter" if c < n_par else "input"
                need = "positive" if strict and low == 0 else "non-negative" if low == 0 else f"at least {low}"
                raise EvaluationError(f"{self._where()}row {r}: {kind} {name!r} must be {need}, "
                                      f"got {float(col[r])}")

    def _symbol_floor(self, c: int, n_par: int) -> tuple[float, bool]:
        """(lowest allowed value, strict) of symbol c (see :func:`symbol_floor`)."""
        return symbol_floor(self.symbols[c], c < n_par, self.info.bounds)

    def _quick_ok(self, arr: np.ndarray, n_par: int) -> bool:
        """Read-only min/max reductions (NaN fails every comparison); the
        detailed search for the offending entry runs only when this fails."""
        par, inp = arr[:, :n_par], arr[:, n_par:]
        if any(b[0] is not None and b[0] < 0 for b in (self.info.bounds or {}).values()):
            return bool(np.isfinite(arr.max())) and bool(np.isfinite(arr.min())) and not any(
                self._floor_violated(arr, c, n_par) for c in range(arr.shape[1]))
        ok = True
        if par.size:
            ok = bool(par.min() > 0) and bool(par.max() < np.inf)
        if ok and inp.size:
            ok = bool(inp.min() >= 0) and bool(inp.max() < np.inf)
        return ok

    def _floor_violated(self, arr, c, n_par) -> bool:
        low, strict = self._symbol_floor(c, n_par)
        if low == -np.inf:
            return False
        m = arr[:, c].min()
        return bool(m <= low) if strict else bool(m < low)

    def _where(self) -> str:
        return f"{self.info.origin}: " if self.info.origin else ""

    def _edge_name(self, e: int) -> str:
        i, j = self.info.edges[e]
        return f"{self.info.states[i]}->{self.info.states[j]}"

    def _check_rates(self, rates: np.ndarray, rows: np.ndarray | None = None) -> None:
        """Refuse a rate that is negative, NaN or infinite, naming the file,
        the row and the edge by its state names. Zero rates are absent edges."""
        ok = rates >= 0
        ok &= rates < np.inf
        if ok.all():
            return
        r, e = np.argwhere(~ok)[0]
        row = int(rows[r]) if rows is not None else int(r)
        v = float(rates[r, e])
        what = "is not a number" if v != v else f"evaluates to {v}"
        raise EvaluationError(f"{self._where()}row {row}: the rate of {self._edge_name(int(e))} {what}; "
                              "rates must be positive and finite")

    # ------------------------------------------------------------ evaluation
    def labels(self, X) -> np.ndarray:
        """Edge rates (N, n_edges) in scheme edge order."""
        return self.label_kernel(self.as_array(X))

    def _outputs(self, arr, threads=None, out=None):
        """All kernel outputs (N, n_outputs), written into ``out`` if given."""
        if self.kernel is None:
            raise EvaluationError("this model was compiled for the looped numeric path only")
        return self.kernel(arr, out, threads=threads)

    def _require_single(self):
        if len(self.info.components) != 1:
            comps = "; ".join("{" + ", ".join(self.info.states[i] for i in c) + "}"
                              for c in self.info.components)
            raise EvaluationError(f"the scheme has {len(self.info.components)} terminal components "
                                  f"({comps}), so its steady state is not unique; use basis(X)")

    # Row-sum tolerance of the straight-line outputs. The in-kernel guard
    # (frontend.guard_factor) makes a failing set's sum differ from 1 by at
    # least 2^-38, so this also catches every set outside the safe range.
    ROW_SUM_TOL = 2.0 ** -40

    def _guarded(self, arr, threads=None, out=None, *, bits=NOT_PROBABILITY):
        """The one checked evaluation every output goes through.

        Runs the kernel and returns ``(outputs, bad)``: ``bad`` (None when no
        row is flagged) marks the rows whose steady state (every block of the
        basis) is not a probability vector to working accuracy — non-finite,
        rows outside the range where the straight-line formulas are safe (the
        in-kernel guard), zero rates (absent edges) — and, when ``bits`` has
        NOT_FINITE, rows whose observables are not finite. Those rows must be
        recomputed (:meth:`_numeric`) or refused by the caller.

        Kernels built with the fused checks (:class:`.kernel.RowChecks`) test
        the symbols, the row sums and the observables while they hold each
        block of rows: one pass over X, one status byte per row, and Python
        looks at the status only when the kernel flagged a row (a flagged
        symbol is refused by :meth:`_check`, with its message). Otherwise the
        caller has checked the symbols (:meth:`as_array`) and the sums are
        tested here; rates are checked first when some rate may evaluate
        negative (a subtraction in a label, a signed symbol)."""
        if self._fused:
            check_threads(threads)
            kernel = self.kernel
            n = arr.shape[0]
            if out is None:
                out = np.empty((n, kernel.n_outputs))
            status = np.empty(n, dtype=np.uint8)
            if kernel.check(arr, out, status, kernel.threads_for(n, threads)) == 0:
                return out, None
            return out, self._flagged(arr, status, bits)
        if self.info.signed_rates:
            self._check_rates(self.label_kernel(arr))
        outputs = self._outputs(arr, threads, out)
        n, c = len(self.states), len(self.info.components)
        key = "p" if "p" in self.info.groups else "basis"
        a, b = self.info.groups[key]
        ones = np.ones(n)
        bad = np.zeros(arr.shape[0], dtype=bool)
        for k in range(c if key == "basis" else 1):
            block = outputs[:, a + k * n:a + (k + 1) * n]
            bad |= ~(np.abs(block @ ones - 1.0) <= self.ROW_SUM_TOL)
        if not self.info.guarded and self.info.tree_edges:
            bad |= self._tree_underflow(arr)          # kernels compiled before the in-kernel guard
        if bits & NOT_FINITE and "obs" in self.info.groups:
            a, b = self.info.groups["obs"]
            bad |= ~np.isfinite(outputs[:, a:b]).all(axis=1)
        return outputs, (bad if bad.any() else None)

    def _flagged(self, arr: np.ndarray, status: np.ndarray, bits: int):
        """Rows a checked kernel flagged (``status``, one byte per row) that
        the caller must recompute; a flagged symbol is refused with
        :meth:`_check`'s message (the file, the row, the symbol)."""
        if (status & BAD_SYMBOL).any():
            self._check(arr)  # the kernel's floors are _check's: this raises
        bad = (status & (bits | BAD_SYMBOL)) != 0
        return bad if bad.any() else None

    def steady_state(self, X, *, out=None, threads=None) -> np.ndarray:
        """Steady-state probabilities (N, n_states) in :attr:`states` order.

        ``out``, a C-contiguous float64 (N, n_states) array, is written in
        place (no allocation: reuse it in fitting loops); if the call is
        refused, ``out`` may hold partial results."""
        lean = self._lean
        if lean is not None and self._use_fused and type(X) is np.ndarray:
            # the lean path: one native call, no copy of X
            kernel, n_in, n_out = lean
            if threads is not None:
                check_threads(threads)
            fresh = out is None and X.ndim == 2
            if fresh:
                out = np.empty((X.shape[0], n_out))
            status = kernel.plain_check(X, out, threads)          # arguments checked in C
            if status is None and _plain(X, n_in):
                # no C entry, or an out it declined: checked here (the message names the fault)
                n = X.shape[0]
                if not fresh:
                    _check_out(out, (n, n_out), X)
                status = np.empty(n, dtype=np.uint8)
                if not kernel.check(X, out, status, kernel.threads_for(n, threads)):
                    status = 0
            if status is not None:
                if not isinstance(status, int):                    # some row was flagged
                    bad = self._flagged(X, status, NOT_PROBABILITY)
                    if bad is not None:
                        out[bad] = self._numeric(X[bad], rows=np.flatnonzero(bad))
                return out
            if fresh:
                out = None
        if ((self._rate_columns is not None or self._rate_kernel is not None) and self._use_fused
                and _plain(X, len(self.symbols))):
            P = self._looped_lean(X, out, threads)
            if P is not None:
                return P
        self._require_single()
        arr = self._input(X)
        shape = (arr.shape[0], len(self.states))
        check_threads(threads)
        if out is not None:
            _check_out(out, shape, arr)
        if self.kernel is None:
            P = self._numeric(arr)
        else:
            a, b = self.info.groups["p"]
            direct = (out is not None and (a, b) == (0, self.kernel.n_outputs)
                      and out.flags.c_contiguous)
            outputs, bad = self._guarded(arr, threads, out if direct else None)
            P = outputs[:, a:b]
            if bad is not None:
                if not direct:
                    P = np.array(P)
                P[bad] = self._numeric(arr[bad], rows=np.flatnonzero(bad))
        if out is not None:
            if P is not out:
                out[...] = P
            return out
        return P if P.flags.c_contiguous else np.ascontiguousarray(P)

    def _looped_lean(self, X: np.ndarray, out, threads):
        """steady_state of a looped-path model in one pass over X and one
        kernel call. When the rates are bare symbols (:attr:`_rate_columns`),
        X (or its columns in edge order) goes straight to the plan: every
        symbol is a rate and no symbol's floor lies above 0
        (:func:`symbol_floor`), so a set the plan's kernel accepts (rates
        positive and finite) passes the symbol checks too. Otherwise the label
        kernel evaluates the rates and checks every symbol against its floor
        and every rate for finiteness in the same pass (:class:`.kernel.RowChecks`).
        Returns None when a set was flagged or refused (a zero input, a bad
        value): the full path then explains it or solves the rows with absent
        edges, from scratch."""
        from .numeric import EliminationPlan

        n = X.shape[0]
        check_threads(threads)
        if out is None:
            out = np.empty((n, len(self.states)))
        else:
            _check_out(out, (n, len(self.states)), X)
        if self._rate_columns is None:
            k = self._rate_kernel
            rates = np.empty((n, k.n_outputs))
            status = np.empty(n, dtype=np.uint8)
            if k.check(X, rates, status, k.threads_for(n, threads)):
                return None
        elif self._rates_are_X:
            rates = X
        else:
            rates = np.take(X, self._rate_columns, axis=1)
        if self.plan is None:
            self.plan = EliminationPlan(len(self.states), self.info.edges)
        try:
            self.plan.steady_state(rates, out=out, threads=threads)
        except EvaluationError:
            return None
        return out

    def _tree_underflow(self, arr: np.ndarray) -> np.ndarray:
        """Rows where a tree product of labels scaled by their maximum could
        fall below the normal float64 range: (min/max)^(n−1) < 1e-290 (only
        for kernels compiled before the guard moved into the kernel)."""
        rates = self.label_kernel(arr)
        positive = np.where(rates > 0, rates, np.nan)
        with np.errstate(all="ignore"):
            spread = np.log10(np.nanmax(positive, axis=1)) - np.log10(np.nanmin(positive, axis=1))
        return self.info.tree_edges * np.nan_to_num(spread) > 290.0

    def _numeric(self, arr: np.ndarray, rows: np.ndarray | None = None) -> np.ndarray:
        """The looped subtraction-free elimination on every row of ``arr``
        (``rows``: their indices in the caller's input, for messages).

        Rates are checked (negative, NaN or infinite: refused with the edge's
        name). A zero rate is an absent edge (an input concentration of
        zero): rows with zero rates are solved on the graph of their positive
        edges, one plan per pattern of zeros, provided that graph still has a
        unique terminal component (the others get probability zero)."""
        from .numeric import EliminationPlan

        rates = self.label_kernel(arr)
        self._check_rates(rates, rows)
        if self.plan is None:
            self.plan = EliminationPlan(len(self.states), self.info.edges)
        zero = rates == 0
        rows_with_zero = zero.any(axis=1)
        if not rows_with_zero.any():
            return self.plan.steady_state(rates)
        P = np.zeros((len(arr), len(self.states)))
        if (~rows_with_zero).any():
            P[~rows_with_zero] = self.plan.steady_state(rates[~rows_with_zero])
        for pattern in np.unique(zero[rows_with_zero], axis=0):
            sel = np.flatnonzero(rows_with_zero & (zero == pattern).all(axis=1))
            first = int(rows[sel[0]]) if rows is not None else int(sel[0])
            comp, local_edges, keep = self._positive_subgraph(pattern, first)
            sub = self._zero_plans.get(pattern.tobytes())
            if sub is None:
                sub = self._zero_plans[pattern.tobytes()] = (
                    EliminationPlan(len(comp), local_edges) if len(comp) > 1 else None)
            if sub is None:
                P[sel, comp[0]] = 1.0
            else:
                P[np.ix_(sel, comp)] = sub.steady_state(rates[np.ix_(sel, keep)])
        return P

    def _positive_subgraph(self, zero_edges: np.ndarray, row: int):
        from .numeric import _terminal_states

        n = len(self.states)
        out_adj = [[] for _ in range(n)]
        for e, (i, j) in enumerate(self.info.edges):
            if not zero_edges[e]:
                out_adj[i].append(j)
        try:
            comp = sorted(_terminal_states(n, out_adj))
        except EvaluationError:
            names = [self._edge_name(e) for e in range(len(self.info.edges)) if zero_edges[e]]
            raise EvaluationError(f"{self._where()}row {row}: with a zero rate on {', '.join(names[:4])} the scheme has "
                                  "several terminal components, so its steady state is not unique") from None
        local = {s: a for a, s in enumerate(comp)}
        keep = [e for e, (i, j) in enumerate(self.info.edges)
                if not zero_edges[e] and i in local and j in local]
        return comp, [(local[self.info.edges[e][0]], local[self.info.edges[e][1]]) for e in keep], keep

    def basis(self, X, *, threads=None) -> np.ndarray:
        """One steady state per terminal component: (N, n_components, n_states)."""
        arr = self._input(X)
        n, c = len(self.states), len(self.info.components)
        if self.kernel is None:
            if c == 1:
                return self._numeric(arr)[:, None, :]
            raise EvaluationError("basis() of a scheme with several terminal components needs a "
                                  "straight-line method (trees or elimination)")
        key = "p" if c == 1 else "basis"
        a, b = self.info.groups[key]
        outputs, bad = self._guarded(arr, threads)
        B = np.array(outputs[:, a:b]).reshape(arr.shape[0], c, n)
        if bad is not None:
            rows = np.flatnonzero(bad)
            B[rows] = (self._numeric(arr[rows], rows)[:, None, :] if c == 1
                       else self._numeric_basis(arr[rows], rows))
        return B

    def _numeric_basis(self, arr: np.ndarray, rows: np.ndarray) -> np.ndarray:
        """Basis rows on the looped path: each terminal component solved on
        its own edges (a component is closed, so its steady state is the
        chain restricted to it)."""
        from .numeric import EliminationPlan

        rates = self.label_kernel(arr)
        self._check_rates(rates, rows)
        n, comps = len(self.states), self.info.components
        B = np.zeros((len(arr), len(comps), n))
        for k, comp in enumerate(comps):
            if len(comp) == 1:
                B[:, k, comp[0]] = 1.0
                continue
            local = {s: a for a, s in enumerate(comp)}
            keep = [e for e, (i, j) in enumerate(self.info.edges) if i in local and j in local]
            zero = rates[:, keep] == 0
            if zero.any():
                r = int(np.argwhere(zero)[0][0])
                names = [self._edge_name(keep[e]) for e in np.flatnonzero(zero[r])]
                raise EvaluationError(f"{self._where()}row {int(rows[r])}: a zero rate on {', '.join(names[:4])} "
                                      "inside a terminal component; basis() needs positive rates there")
            plan = self._zero_plans.get(("basis", k))
            if plan is None:
                edges = [(local[self.info.edges[e][0]], local[self.info.edges[e][1]]) for e in keep]
                plan = self._zero_plans[("basis", k)] = EliminationPlan(len(comp), edges)
            B[np.ix_(np.arange(len(arr)), [k], comp)] = plan.steady_state(rates[:, keep])[:, None, :]
        return B

    def observables(self, X, *, threads=None) -> np.ndarray:
        """Observables (N, n_observables): Σ_i p_i·w_ik(θ), the weights numbers,
        rate expressions or edge rates (fluxes), evaluated per row.

        Rows the steady-state guard does not trust (and rows where the
        kernel's observable is not finite) are recomputed from the guarded
        steady state with the weights evaluated at that row. A net flux
        J+ − J− carries an absolute error of a few ε·(J+ + J−)."""
        if not self.info.observable_names:
            raise EvaluationError("the model declares no observables")
        self._require_single()
        arr = self._input(X)
        if self.kernel is None or "obs" not in self.info.groups:
            return self.observables_from(arr, self.steady_state(arr, threads=threads))
        a, b = self.info.groups["obs"]
        outputs, bad = self._guarded(arr, threads, bits=NOT_PROBABILITY | NOT_FINITE)
        O = np.array(outputs[:, a:b])
        if bad is not None:
            rows = np.flatnonzero(bad)
            O[rows] = self.observables_from(arr[rows], self._numeric(arr[rows], rows))
        return O

    def observables_from(self, X, P) -> np.ndarray:
        """Observables (N, n_observables) of rows ``X`` whose steady state is
        ``P`` (N, n_states): the weights evaluated per row, then Σ_i p_i·w_ik.
        A value beyond float64 is refused."""
        arr = np.asarray(X, dtype=np.float64)
        P = np.asarray(P, dtype=np.float64)
        terms = self._observable_terms()
        O = np.zeros((P.shape[0], len(self.info.observable_names)))
        with np.errstate(all="ignore"):
            # term by term, never through BLAS: the same bits in every process
            # whatever its BLAS threads (sampling on a cluster must match a local run)
            for k, i, tree in terms:
                O[:, k] += P[:, i] * _tree_values(tree, arr)
        bad = ~np.isfinite(O)
        if bad.any():
            r, k = np.argwhere(bad)[0]
            raise EvaluationError(f"row {r}: observable {self.info.observable_names[k]!r} is not a finite "
                                  "float64 number at these values")
        return O

    def _observable_terms(self) -> list:
        """[observable, state, weight tree] of every nonzero weight (from the
        constant matrix for models compiled without terms)."""
        if self.info.observable_terms:
            return self.info.observable_terms
        W = self._constant_weight_matrix()
        return [[k, i, ["num", repr(float(W[i, k]))]] for i, k in np.argwhere(W != 0)]

    def _constant_weight_matrix(self) -> np.ndarray:
        return np.asarray(self.info.observable_weights, dtype=np.float64).reshape(
            len(self.states), len(self.info.observable_names))

    @property
    def observable_weights(self) -> np.ndarray:
        """Weights (n_states × n_observables) of observables whose weights are
        all numbers; refused for a rate observable (its weights depend on the
        symbols: use :meth:`observables` or :meth:`observables_from`)."""
        for k, i, tree in self.info.observable_terms:
            if tree[0] != "num":
                raise EvaluationError(f"observable {self.info.observable_names[k]!r} is a rate: its weights "
                                      "depend on the symbols and are evaluated per row")
        return self._constant_weight_matrix()

    def _observable_rows(self, row: np.ndarray, D: np.ndarray, cols) -> np.ndarray:
        """∂O/∂θ (or ∂O/∂log θ) of one row on the safe path, from the safe
        steady-state derivatives D (n_states × len(cols)):
        Σ_i w_ik ∂p_i + p_i ∂w_ik, the weight gradients by dual numbers."""
        import mpmath

        from .sensitivity import _dual

        P = self.steady_state(row)[0]
        theta = [mpmath.mpf(float(x)) for x in row[0]]
        out = np.zeros((len(self.info.observable_names), len(cols)))
        for k, i, tree in self._observable_terms():
            try:
                w, grad = _dual(tree, theta, mpmath)
            except (ValueError, ZeroDivisionError):
                raise EvaluationError(f"observable {self.info.observable_names[k]!r}: its weight cannot be "
                                      "evaluated at these values") from None
            dw = np.array([float(grad[j]) for j in cols])
            if self.info.log_jacobian:
                dw = dw * row[0, cols]
            out[k] += float(w) * D[i] + P[i] * dw
        return out

    def jacobian(self, X, *, threads=None) -> np.ndarray:
        """∂p_i/∂θ_j as (N, n_states, n_symbols) (∂p_i/∂log θ_j if compiled with
        log_jacobian=True). Accurate to 1e-12 of the natural size p_i/|θ_j|
        (p_i for the log form) or refused; see :meth:`_derivatives`."""
        if "jac" not in self.info.groups:
            raise EvaluationError("compile with jacobian=True to get derivatives")
        self._require_single()
        return self._derivatives(self._input(X), "jac", None, threads)

    def observable_jacobian(self, X, *, threads=None) -> np.ndarray:
        """∂O_k/∂θ_j as (N, n_observables, n_symbols) when compiled with jacobian."""
        if "obs_jac" not in self.info.groups:
            raise EvaluationError("compile with jacobian=True (and declare observables) for their gradients")
        self._require_single()
        return self._derivatives(self._input(X), "obs_jac", self._observable_rows, threads)

    def _derivatives(self, arr, group, weights, threads) -> np.ndarray:
        """The compiled log-form derivatives of ``group``, divided by θ for the
        plain form; rows the steady-state guard does not trust, non-finite
        entries, and plain derivatives at θ_j = 0 go to the multiprecision
        path of :mod:`.sensitivity`. A derivative beyond float64 is refused."""
        from .sensitivity import jacobian_rows

        out, redo = self._guarded(arr, threads)
        N, nsym = arr.shape[0], len(self.symbols)
        redo = np.zeros(N, dtype=bool) if redo is None else redo
        a, b = self.info.groups[group]
        J = np.array(out[:, a:b]).reshape(N, -1, nsym)
        zero = np.zeros_like(arr, dtype=bool)
        if not self.info.log_jacobian:
            zero = arr == 0
            with np.errstate(all="ignore"):
                J /= arr[:, None, :]
        redo |= ~np.isfinite(J).all(axis=(1, 2))
        rows = np.flatnonzero(redo | zero.any(axis=1))
        if rows.size:
            if not self.info.label_trees:
                raise EvaluationError(f"{self.info.name}: {rows.size} rows need the safe derivative path, "
                                      "which needs the label trees (recompile the model)")
            n = len(self.states)
            for r in rows:
                cols = list(range(nsym)) if redo[r] else list(np.flatnonzero(zero[r]))
                D = jacobian_rows(n, self.info.edges, self.info.label_trees, arr[r:r + 1],
                                  log=self.info.log_jacobian, columns=cols, where=self.info.name)[0]
                J[r][:, cols] = D if weights is None else weights(arr[r:r + 1], D, cols)
        bad = ~np.isfinite(J)
        if bad.any():
            r, i, j = np.argwhere(bad)[0]
            raise EvaluationError(f"row {r}: the derivative along {self.symbols[j]!r} exceeds the float64 "
                                  f"range at these values")
        return J

    def input_derivatives(self, X, *, observables: bool = False, threads=None):
        """(first, second) derivatives along the input named at compile time,
        each (N, n_states), or (N, n_observables) with ``observables=True``.

        Rows the straight-line formulas cannot evaluate safely (see
        :meth:`steady_state`) are refused: the looped path has no derivatives."""
        prefix = "obs_" if observables else ""
        if prefix + "d1" not in self.info.groups:
            raise EvaluationError("compile with input_derivatives=NAME to get derivatives along an input")
        self._require_single()
        arr = self._input(X)
        out, bad = self._guarded(arr, threads)
        if bad is not None:
            r = int(np.argmax(bad))
            self._numeric(arr[r:r + 1], np.array([r]))       # names a bad rate or zero pattern, if any
            raise EvaluationError(f"{self._where()}row {r}: the rates span too many orders of magnitude "
                                  "(or a rate is zero) for the compiled derivatives; evaluate the steady "
                                  "state there, or narrow the range")
        (a1, b1), (a2, b2) = self.info.groups[prefix + "d1"], self.info.groups[prefix + "d2"]
        return np.ascontiguousarray(out[:, a1:b1]), np.ascontiguousarray(out[:, a2:b2])

    # ------------------------------------------------------------ closed forms and code
    def formula(self, state: str, **options):
        """SymPy expression of ρ_state, the unnormalized steady-state weight."""
        if state not in self.info.states:
            raise EvaluationError(f"unknown state {state!r}; states are {', '.join(self.info.states)}")
        if self._formula is None:
            raise EvaluationError("this model carries no closed form (loaded without its compiler)")
        return self._formula(state, **options)

    def emit(self, target: str, out_dir) -> list:
        """Write standalone source for ``target`` (python, c, cython, llvm) into ``out_dir``."""
        if self._emitter is None:
            raise EvaluationError("this model carries no emitter (loaded without its compiler)")
        return self._emitter(target, out_dir)

    # ------------------------------------------------------------ pickling
    def __reduce__(self):
        """Pickle as data, never as a JIT engine or a loaded library: the
        compiler's recipe (the scheme and the compile options, rebuilt once per
        process through the cache) when the model has one, else the metadata and
        the kernels' generated source. The recipe names a compiler function that
        pickle imports by module path, so this module never imports the compiler."""
        recipe = self.__dict__.get("recipe")
        if recipe is not None:
            return recipe
        return (CompiledModel, (self.info, self.kernel, self.label_kernel))


# ------------------------------------------------------------ argument checks

def symbol_floor(name: str, parameter: bool, bounds: dict | None) -> tuple[float, bool]:
    """(lowest allowed value, strict) of a symbol: a declared min below 0
    lets the symbol be negative (voltages, free energies) — rates are
    checked instead; otherwise parameters > 0 and inputs ≥ 0."""
    low = bounds.get(name, (None, None))[0] if bounds else None
    if low is not None and low < 0:
        return -np.inf, False
    if low is not None and low == 0:
        return 0.0, False
    return 0.0, parameter


def symbol_floors(names, n_par: int, bounds: dict | None) -> tuple:
    """``(low, inclusive)`` per symbol for the checks fused into the kernels
    (:class:`~treeflux.runtime.kernel.RowChecks`): the same rule as
    :meth:`CompiledModel._check`."""
    return tuple((float(low), not strict) for low, strict in
                 (symbol_floor(s, c < n_par, bounds) for c, s in enumerate(names)))


def _shown(value) -> str:
    """A short one-line repr for messages (no control characters, no numpy repr)."""
    if isinstance(value, (bool, np.bool_)):
        text = type(value).__name__
    elif isinstance(value, (int, np.integer)):
        text = repr(int(value))
    elif isinstance(value, (float, np.floating)):
        text = repr(float(value))
    else:
        text = repr(value) if isinstance(value, str) else type(value).__name__
    text = text if text.isprintable() else ascii(text)
    return text if len(text) <= 60 else text[:57] + "..."


def _real_array(value, what: str) -> np.ndarray:
    """``value`` as a float64 array, refusing anything that is not plainly real
    numbers (numpy would otherwise parse strings, drop imaginary parts, ignore
    masks or raise its own errors)."""
    if isinstance(value, np.ma.MaskedArray):
        raise EvaluationError(f"{what}: masked arrays are not accepted; fill or drop the masked entries")
    if value is None:
        raise EvaluationError(f"{what}: got None, expected numbers")
    if isinstance(value, (str, bytes)):
        raise EvaluationError(f"{what}: got the string {_shown(value)}, expected numbers")
    if isinstance(value, (bool, np.bool_)):
        raise EvaluationError(f"{what}: got a boolean, expected a number")
    try:
        raw = np.asarray(value)
    except (TypeError, ValueError, OverflowError):
        raise EvaluationError(f"{what}: expected numbers (a float array or a dict of name -> value), "
                              f"got {_shown(value)}") from None
    kind = raw.dtype.kind
    if kind in "fiu":
        return raw.astype(np.float64, copy=False)
    names = {"b": "booleans", "c": "complex numbers", "U": "strings", "S": "bytes",
             "M": "dates", "m": "time spans", "V": "structured records"}
    if kind in names:
        raise EvaluationError(f"{what}: got {names[kind]}, expected real numbers")
    try:  # object arrays: Python ints too large for int64, Fractions, None, mixtures
        if all(isinstance(v, (int, float, np.integer, np.floating)) and not isinstance(v, (bool, np.bool_))
               for v in raw.flat):
            return raw.astype(np.float64)
    except OverflowError:
        raise EvaluationError(f"{what}: a number is too large for float64") from None
    raise EvaluationError(f"{what}: expected real numbers, got an array of Python objects")


def _check_out(out, shape: tuple, arr: np.ndarray) -> None:
    """``out`` must be a writable C-contiguous float64 ndarray of ``shape``
    that does not overlap the inputs."""
    if not isinstance(out, np.ndarray) or isinstance(out, (np.ma.MaskedArray, np.matrix)):
        raise EvaluationError(f"out must be a numpy float64 array of shape {shape}, got {type(out).__name__}")
    if out.dtype != np.float64 or out.shape != shape:
        raise EvaluationError(f"out must be a float64 array of shape {shape}, got {out.dtype} {out.shape}")
    if not out.flags.c_contiguous:
        raise EvaluationError("out must be C-contiguous (np.ascontiguousarray or a fresh np.empty)")
    if not out.flags.writeable:
        raise EvaluationError("out is read-only")
    if np.may_share_memory(out, arr):
        raise EvaluationError("out must not share memory with the inputs")

_UNARY = {"neg": np.negative, "exp": np.exp, "log": np.log, "sqrt": np.sqrt}
_BINARY = {"add": np.add, "sub": np.subtract, "mul": np.multiply, "div": np.divide, "pow": np.power}


def _tree_values(tree, arr: np.ndarray) -> np.ndarray:
    """A weight tree (the form of ModelInfo.label_trees) at every row of ``arr``."""
    op = tree[0]
    if op == "num":
        from fractions import Fraction
        return np.full(arr.shape[0], float(Fraction(tree[1])))
    if op == "sym":
        return arr[:, tree[1]]
    args = [_tree_values(t, arr) for t in tree[1:]]
    return (_UNARY if len(args) == 1 else _BINARY)[op](*args)
