"""Analysis subcommands of the ``treeflux`` command: response, thermo,
passage, sample, fit.

:func:`register` adds them to the main parser's sub-parsers; each sets
``handler`` to a function ``(args) -> exit status``. Bad input raises a
:class:`~treeflux.runtime.errors.TreefluxError`, which the main command
turns into one line on stderr and exit status 2. The numbers are computed by
:mod:`treeflux.runtime.analysis`; this module loads, compiles, prints and
plots.
"""

from __future__ import annotations

import math
import sys

from treeflux.runtime.errors import EvaluationError

METHODS = ["auto", "trees", "elimination", "equilibrium", "numeric"]
BACKENDS = ["python", "c", "cython", "llvm"]


# ------------------------------------------------------------------ helpers

def _cli():
    from . import cli
    return cli


def _compile(path, method="auto", backend="python"):
    """Load a model file and compile it (module level: picklable for workers)."""
    from .pipeline import compile_scheme
    scheme = _cli().load_model(path)
    return scheme, compile_scheme(scheme, method=method, backend=backend)


def _values(args) -> dict:
    return _cli().parse_sets(getattr(args, "set", None))


def _emit(obj) -> None:
    _cli().emit_json(obj)


def parse_range(text: str) -> tuple[float, float]:
    """``"LO:HI"`` → (lo, hi) with 0 < lo < hi, finite; one-line errors."""
    lo_t, sep, hi_t = (text or "").partition(":")
    try:
        if not sep:
            raise ValueError
        lo, hi = float(lo_t), float(hi_t)
    except ValueError:
        raise EvaluationError(f"bad range {text!r}: expected LO:HI, two numbers with 0 < LO < HI") from None
    if not (math.isfinite(lo) and math.isfinite(hi) and 0 < lo < hi):
        raise EvaluationError(f"bad range {text!r}: need 0 < LO < HI, both finite")
    return lo, hi


def _pyplot():
    """matplotlib's pyplot on a file-only backend, or a clear error."""
    try:
        import matplotlib
    except ImportError:
        raise EvaluationError("--plot needs matplotlib, which is not installed "
                              "(install the optional extra: pip install 'treeflux[plot]')") from None
    matplotlib.use("Agg")
    import matplotlib.pyplot as plt
    return plt


def _g(v) -> str:
    return "n/a" if v is None else f"{v:.6g}"


# ------------------------------------------------------------------ response

def cmd_response(args) -> int:
    from treeflux.runtime.analysis import response_curve
    lo, hi = parse_range(args.range)
    plt = _pyplot() if args.plot else None
    values = _values(args)
    _, model = _compile(args.model, args.method, args.backend)
    r = response_curve(model, observable=args.observable, input=args.input, lo=lo, hi=hi,
                       points=args.points, values=values)
    if plt is not None:
        import numpy as np
        fig, ax = plt.subplots(figsize=(6, 4))
        x = np.array(r["curve"]["x"])
        ax.semilogx(x, r["curve"]["y_normalized"], label=f"{r['observable']} (normalized)")
        n, K = r["hill_fit"]["n"], r["hill_fit"]["K"]
        ax.semilogx(x, 1.0 / (1.0 + (K / x) ** n), "--", label=f"Hill fit n={n:.3g}, K={K:.3g}")
        for key in ("ec10", "ec50", "ec90"):
            if r[key] is not None:
                ax.axvline(r[key], color="grey", lw=0.6)
        ax.set_xlabel(r["input"])
        ax.set_ylabel("normalized response (model prediction)")
        ax.legend()
        fig.tight_layout()
        fig.savefig(args.plot, dpi=120)
        plt.close(fig)
        r["plot"] = str(args.plot)
    if args.json:
        _emit(r)
        return 0
    print(f"response of {r['observable']} to {r['input']} over [{lo:g}, {hi:g}] "
          f"({r['direction']}; model predictions):")
    for key in ("ec10", "ec50", "ec90", "hill_effective", "max_slope", "max_slope_at",
                "max_log_slope", "max_log_slope_at"):
        print(f"  {key:<17} {_g(r[key])}")
    print(f"  hill_fit          n = {r['hill_fit']['n']:.6g}, K = {r['hill_fit']['K']:.6g} "
          f"(rms {r['hill_fit']['rms']:.2g})")
    if not r["monotone"]:
        print("  note: not monotone over the range; EC values are first crossings")
    return 0


# ------------------------------------------------------------------ thermo

def cmd_thermo(args) -> int:
    from treeflux.runtime.analysis import thermodynamics
    from .structure import detailed_balance
    values = _values(args)
    scheme, model = _compile(args.model, args.method, args.backend)
    r = thermodynamics(model, values)
    verdict = detailed_balance(scheme)
    numeric = r["detailed_balance"]
    r["detailed_balance"] = {
        "verdict": verdict["verdict"],
        "conditions": verdict["conditions"],
        "reason": verdict["reason"],
        "holds_at_values": numeric["holds"],
        "max_abs_affinity": numeric["max_abs_affinity"],
        "numeric_reason": numeric["reason"],
    }
    if args.json:
        _emit(r)
        return 0
    sigma = r["entropy_production"]
    print(f"thermodynamics of {scheme.name} at the given values (model predictions):")
    print(f"  entropy production: {_g(sigma) if sigma is not None else 'infinite'} k_B per unit time"
          + (f"  ({r['entropy_production_note']})" if sigma is None else ""))
    print("  net fluxes:")
    for k, v in r["fluxes"].items():
        print(f"    {k:<20} {v:.6g}{'  (one-way)' if k in r['one_way_edges'] else ''}")
    if r["affinities"]:
        print("  cycle affinities:")
        for c in r["affinities"]:
            a = c["affinity"]
            print(f"    {'->'.join(c['states'] + c['states'][:1]):<30} "
                  f"{_g(a) if a is not None else c.get('note', 'undefined')}")
    db = r["detailed_balance"]
    print(f"  detailed balance: {db['verdict']} ({db['reason']}); at these values: {db['holds_at_values']}")
    for cond in db["conditions"]:
        print(f"    condition: {cond}")
    return 0


# ------------------------------------------------------------------ passage

def cmd_passage(args) -> int:
    from treeflux.runtime.analysis import mean_first_passage
    targets = [t.strip() for t in args.to.split(",") if t.strip()]
    if not targets:
        raise EvaluationError(f"--to {args.to!r}: give one or more target states separated by commas")
    values = _values(args)
    _, model = _compile(args.model, args.method, args.backend)
    r = mean_first_passage(model, values, source=args.source, targets=targets)
    if args.json:
        _emit(r)
        return 0
    t = r["mean_time"]
    print(f"mean first-passage time {args.source} -> {{{', '.join(targets)}}}: "
          f"{'infinite' if t is None else f'{t:.6g}'} (model prediction)")
    return 0


# ------------------------------------------------------------------ sample

def cmd_sample(args) -> int:
    from treeflux.runtime import progress, safe_io
    from treeflux.runtime.sampling import sample, summarize, write_csv, write_table
    spec = [args.observable, args.input, args.range]
    if any(v is not None for v in spec) and not all(v is not None for v in spec):
        raise EvaluationError("--observable, --input and --range go together: give all three or none")
    response = None
    if args.range is not None:
        lo, hi = parse_range(args.range)
        response = {"observable": args.observable, "input": args.input, "lo": lo, "hi": hi,
                    "points": args.points}
    if args.quiet or args.json:
        progress.set_enabled(False)
    for path in (args.out, args.plot):
        if path:
            safe_io.check_target(path)             # refused before the sweep, not after it
    plt = _pyplot() if args.plot else None
    values = _values(args)
    _, model = _compile(args.model, args.method, args.backend)
    written = None
    try:
        r = sample(model, args.n, seed=args.seed, values=values, response=response,
                   workers=args.workers, scheduler=args.scheduler)
        if args.out:
            written = write_table(r, args.out)
        if plt is not None:
            _plot_samples(plt, r, args.plot)
    except KeyboardInterrupt:   # the cluster is closed and no partial file is left by now
        print(f"treeflux: interrupted; {f'only {written} was written' if written else 'nothing was written'}",
              file=sys.stderr)
        return 130
    stats = summarize(r)
    if args.json:
        summary = {"n": args.n, "seed": args.seed, "columns": r["columns"], "ranges": r["ranges"],
                   "fixed": r["fixed"], "response": r["response"], "out": args.out,
                   "plot": args.plot, "note": r["note"], "summary": stats["columns"]}
        if "curves" in stats:
            summary["curves"] = stats["curves"]
        if not args.out:
            summary["rows"] = r["data"]
        _emit(summary)
    elif not args.out:
        write_csv(r, sys.stdout)
    else:
        print(f"wrote {args.n} samples ({len(r['columns'])} columns) to {args.out} (model predictions)")
        _print_sample_summary(r, stats)
    return 0


def _print_sample_summary(r, stats) -> None:
    curves = stats.get("curves")
    if curves is not None:
        task = r["response"]
        print(f"response of {task['observable']} to {task['input']} over [{task['lo']:g}, {task['hi']:g}]: "
              f"{curves['saturated']} curves saturated within the range, {curves['unsaturated']} did not "
              f"(excluded from the statistics below), {curves['flat']} flat")
        names = [c for c in ("ec50", "hill_effective", "max_log_slope") if c in stats["columns"]]
    else:
        names = [c for c in r["columns"] if c not in r["ranges"]]
    for name in names:
        s = stats["columns"][name]
        if s["count"]:
            print(f"  {name:<17} min {_g(s['min'])}  median {_g(s['median'])}  max {_g(s['max'])}  "
                  f"({s['count']} values)")
        else:
            print(f"  {name:<17} no finite values")


def _plot_samples(plt, r, path):
    import numpy as np
    cols, data = r["columns"], r["data"]
    fig, ax = plt.subplots(figsize=(6, 4))
    if r["response"] is not None:
        x, y = data[:, cols.index("ec50")], data[:, cols.index("hill_effective")]
        ok = np.isfinite(x) & np.isfinite(y)
        sat = data[:, cols.index("saturated")] == 1
        ax.scatter(x[ok & sat], y[ok & sat], s=4, alpha=0.5,
                   label=f"saturated within the range ({int((ok & sat).sum())})")
        ax.scatter(x[ok & ~sat], y[ok & ~sat], s=6, facecolors="none", edgecolors="grey", lw=0.5,
                   label=f"not saturated: values describe the range ({int((ok & ~sat).sum())})")
        ax.set_xscale("log")
        ax.set_xlabel(f"EC50 of {r['response']['observable']} in {r['response']['input']}")
        ax.set_ylabel("effective Hill coefficient (model prediction)")
        ax.legend(fontsize="small")
    else:
        outputs = [c for c in cols if c not in r["ranges"]]
        for name in outputs[:8]:
            ax.hist(data[:, cols.index(name)], bins=40, histtype="step", label=name)
        ax.set_xlabel("value (model prediction)")
        ax.set_ylabel("samples")
        ax.legend(fontsize="small")
    fig.tight_layout()
    from treeflux.runtime.safe_io import output_path
    with output_path(path) as tmp:
        fig.savefig(tmp, dpi=120)
    plt.close(fig)


# ------------------------------------------------------------------ fit

def cmd_fit(args) -> int:
    from treeflux.runtime.analysis import fit, read_table
    values = _values(args)
    data = read_table(args.data)
    _, model = _compile(args.model, args.method, args.backend)
    r = fit(model, data, values=values, starts=args.starts, seed=args.seed)
    if args.json:
        _emit(r)
        return 0
    print(f"fit of {len(r['parameters'])} parameters to {r['n_residuals']} values "
          f"(cost {r['cost']:.6g}; {r['message']}):")
    for k, v in r["parameters"].items():
        u = r["uncertainties"][k]
        print(f"  {k:<16} {v:.6g}" + (f" ± {u:.3g}" if u is not None else " (uncertainty undetermined)")
              + ("  at a bound" if k in r["at_bounds"] else ""))
    print(f"  uncertainties: {r['uncertainty_method']}")
    return 0


# ------------------------------------------------------------------ registration

def _common(q, *, sets=True):
    q.add_argument("model", help="model file (TOML)")
    if sets:
        q.add_argument("--set", action="append", metavar="NAME=VALUE", help="fix a symbol's value")
    q.add_argument("--method", default="auto", choices=METHODS)
    q.add_argument("--backend", default="python", choices=BACKENDS)


def _positive_int(text):
    import argparse
    try:
        v = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"{text!r} is not an integer") from None
    if v < 1:
        raise argparse.ArgumentTypeError(f"{text!r} must be at least 1")
    return v


def _sample_count(text):
    """A count of samples: an integer, also written as 1e6 (exactly integral)."""
    import argparse
    try:
        v = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"{text!r} is not a number") from None
    if not (math.isfinite(v) and v >= 1 and v == int(v) and v <= 2 ** 53):
        raise argparse.ArgumentTypeError(f"{text!r} must be a whole number of at least 1")
    return int(text) if text.strip().lstrip("+").isdigit() else int(v)


def register(subparsers) -> None:
    """Add the analysis subcommands to an argparse sub-parsers object."""
    q = subparsers.add_parser("response", help="response curve of an observable to one input")
    _common(q)
    q.add_argument("--observable", required=True, help="observable (or state) name")
    q.add_argument("--input", required=True, help="symbol to sweep")
    q.add_argument("--range", required=True, metavar="LO:HI", help="input range, 0 < LO < HI")
    q.add_argument("--points", type=_positive_int, default=61, help="log-spaced grid points")
    q.add_argument("--plot", metavar="FILE.png", help="draw the curve (needs matplotlib)")
    q.add_argument("--json", action="store_true")
    q.set_defaults(handler=cmd_response)

    q = subparsers.add_parser("thermo", help="fluxes, cycle affinities, entropy production")
    _common(q)
    q.add_argument("--json", action="store_true")
    q.set_defaults(handler=cmd_thermo)

    q = subparsers.add_parser("passage", help="mean first-passage time between states")
    _common(q)
    q.add_argument("--from", dest="source", required=True, metavar="S", help="starting state")
    q.add_argument("--to", required=True, metavar="T[,T2...]", help="target state(s)")
    q.add_argument("--json", action="store_true")
    q.set_defaults(handler=cmd_passage)

    q = subparsers.add_parser("sample", help="sample parameter space log-uniformly")
    _common(q)
    q.add_argument("--n", type=_sample_count, required=True, help="number of samples (1e6 is accepted)")
    q.add_argument("--seed", type=int, default=0, help="0 or more (sample refuses others)")
    where = q.add_mutually_exclusive_group()
    where.add_argument("--workers", type=_positive_int,
                       help="start a local Dask cluster of this many worker processes")
    where.add_argument("--scheduler", metavar="ADDR", help="run on the Dask scheduler at this address")
    q.add_argument("--observable", help="with --input and --range: summarize response curves")
    q.add_argument("--input")
    q.add_argument("--range", metavar="LO:HI")
    q.add_argument("--points", type=_positive_int, default=41, help="grid points per response curve")
    q.add_argument("--out", metavar="FILE", help="write the table (.csv, or .npz) atomically")
    q.add_argument("--plot", metavar="FILE.png", help="draw the samples (needs matplotlib)")
    q.add_argument("--json", action="store_true", help="print a JSON summary")
    if not any("--quiet" in a.option_strings for a in q._actions):
        q.add_argument("--quiet", action="store_true", help="no progress bar")
    q.set_defaults(handler=cmd_sample)

    q = subparsers.add_parser("fit", help="fit bounded parameters to measured observables")
    _common(q)
    q.add_argument("data", help="CSV: symbol columns, observable columns, optional sigma_<observable>")
    q.add_argument("--starts", type=_positive_int, default=1, help="starting points (extra ones random)")
    q.add_argument("--seed", type=int, default=0)
    q.add_argument("--json", action="store_true")
    q.set_defaults(handler=cmd_fit)
