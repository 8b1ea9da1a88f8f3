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
import re
import sys
from functools import partial

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


def _rebuild(path, method, backend):
    return _compile(path, method, backend)[1]


def _values(args) -> dict:
    return _cli().parse_sets(getattr(args, "set", None))


def _emit(obj) -> None:
    _cli().emit_json(obj)


def parse_range(text: str, *, positive: bool = True) -> tuple[float, float]:
    """``"LO:HI"`` → (lo, hi), finite, LO < HI, and 0 < LO unless ``positive``
    is False (the input's domain is then checked by the analysis); one-line errors."""
    need = "0 < LO < HI" if positive else "LO < HI"
    lo_t, sep, hi_t = (text or "").partition(":")
    try:
        if not sep:
            raise ValueError
        lo, hi = float(lo_t), float(hi_t)
    except ValueError:
        raise EvaluationError(f"bad range {text!r}: expected LO:HI, two numbers with {need}") from None
    if not (math.isfinite(lo) and math.isfinite(hi) and lo < hi and (lo > 0 or not positive)):
        raise EvaluationError(f"bad range {text!r}: need {need}, both finite")
    return lo, hi


def _check_outputs(args) -> None:
    """Refuse a bad ``--plot`` (format or target) or ``--out`` target before any
    computation: only .png, .svg and .pdf are drawn (safe_io.PLOT_SUFFIXES)."""
    from treeflux.runtime.safe_io import check_plot_target, check_target
    if getattr(args, "plot", None):
        check_plot_target(args.plot)
    if getattr(args, "out", None):
        check_target(args.out)


def _savefig(fig, path) -> None:
    """Write a figure through safe_io (temporary in a private folder, renamed into place)."""
    from pathlib import Path
    from treeflux.runtime.safe_io import output_path
    with output_path(path) as tmp:
        fig.savefig(tmp, dpi=120, format=Path(path).suffix[1:].lower())


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
    _check_outputs(args)
    lo, hi = parse_range(args.range, positive=False)
    plt = _pyplot() if args.plot else None
    values = _values(args)
    _, model = _compile(args.model, args.method, args.backend)
    r = response_curve(model, observable=args.observable, input=args.input, lo=lo, hi=hi,
                       points=args.points, values=values, normalization=args.normalize,
                       spacing=args.spacing)
    if plt is not None:
        _plot_response(plt, r, args.plot)
        r["plot"] = str(args.plot)
    if args.json:
        _emit(r)
        return 0
    _print_response(r)
    return 0


def _print_response(r) -> None:
    lo, hi = r["range"]
    norm = ("its extremes over the range" if r["normalization"] == "range" else
            "its limits at the ends of the input's domain" if r["monotone"] else
            "its limits and its peak")
    print(f"response of {r['observable']} to {r['input']} over [{lo:g}, {hi:g}] "
          f"({r['direction']}, {r['spacing']} grid; model predictions), normalized to {norm}:")
    for side in ("lower", "upper"):
        lim = r["limits"][side]
        where = "" if lim["evaluated_at"] is None else f"; value at {r['input']} = {lim['evaluated_at']:.3g}"
        print(f"  limit at {lim['at']:<5}    {_g(lim['value'])}  ({lim['how']}{where})")
    if r["monotone"] or r["ec50"] is not None:
        keys = ["ec10", "ec50", "ec90"] + (["hill_effective"] if r["domain"] != "signed" else [])
    else:
        p, h = r["peak"], r["half_points"]
        print(f"  not monotone: {p['kind']} {_g(p['y'])} at {r['input']} = {_g(p['x'])}; "
              f"half-points rising {_g(h['rising'])}, falling {_g(h['falling'])}")
        print("  no EC levels, effective Hill coefficient or Hill fit for a curve that is not monotone")
        keys = []
    keys += ["max_slope", "max_slope_at"] + (["max_log_slope", "max_log_slope_at"]
                                             if r["domain"] != "signed" else [])
    for key in keys:
        print(f"  {key:<17} {_g(r[key])}")
    if r["hill_fit"] is not None:
        print(f"  hill_fit          n = {r['hill_fit']['n']:.6g}, K = {r['hill_fit']['K']:.6g} "
              f"(rms {r['hill_fit']['rms']:.2g})")
    if r.get("logistic_fit") is not None:
        f = r["logistic_fit"]
        print(f"  logistic_fit      x_half = {f['x_half']:.6g}, slope_factor = {f['slope_factor']:.6g} "
              f"(rms {f['rms']:.2g})")
    print(f"  saturated         {'yes' if r['saturated'] else 'no'} (saturated means both ends of "
          f"the range lie within {100 * r['saturation_tolerance']:g}% of the span from their limits)")
    for w in r["warnings"]:
        print(f"  warning: {w}")


def _plot_response(plt, r, path) -> None:
    """The normalized curve, its reference fit, EC lines and the peak."""
    import numpy as np
    fig, ax = plt.subplots(figsize=(6.4, 4.4))
    x = np.array(r["curve"]["x"])
    yn = np.array(r["curve"]["y_normalized"])
    ax.plot(x, yn, lw=2, label=f"{r['observable']} (model prediction)")
    if r["spacing"] == "log":
        ax.set_xscale("log")
    fine = (np.geomspace(x[0], x[-1], 400) if r["spacing"] == "log"
            else np.linspace(x[0], x[-1], 400))
    if r["hill_fit"] is not None:
        n, K = r["hill_fit"]["n"], r["hill_fit"]["K"]
        pos = fine[fine > 0]
        ax.plot(pos, 1.0 / (1.0 + (K / pos) ** n), "--", color="C1",
                label=f"reference Hill curve n={n:.3g}, K={K:.3g}")
    if r.get("logistic_fit") is not None:
        x0, s = r["logistic_fit"]["x_half"], r["logistic_fit"]["slope_factor"]
        ax.plot(fine, 0.5 * (1.0 + np.tanh(0.5 * (fine - x0) / s)), "--", color="C1",
                label=f"reference logistic x_half={x0:.3g}, s={s:.3g}")
    shown = [r[k] for k in ("ec10", "ec50", "ec90") if r[k] is not None and x[0] <= r[k] <= x[-1]]
    for i, v in enumerate(shown):
        ax.axvline(v, color="grey", lw=0.6, label="EC10, EC50, EC90" if i == 0 else None)
    if not r["monotone"] and r["peak"]["x"] is not None and r["peak"]["in_range"]:
        p = r["peak"]
        ax.plot([p["x"]], [p["y_normalized"]], "v" if p["kind"] == "maximum" else "^",
                color="C3", ms=9, label=f"{p['kind']} {p['y']:.3g} at {p['x']:.3g}")
        halves = [h for h in r["half_points"].values() if h is not None and x[0] <= h <= x[-1]]
        for i, h in enumerate(halves):
            ax.axvline(h, color="C3", lw=0.6, ls=":", label="half-points" if i == 0 else None)
    ax.set_xlabel(f"{r['input']} ({r['spacing']} scale)")
    ax.set_ylabel(f"{r['observable']}, normalized to its "
                  + ("range" if r["normalization"] == "range" else
                     "limits" if r["monotone"] else "limits and peak"))
    ax.set_title(f"Model prediction: response of {r['observable']} to {r['input']}", fontsize=10)
    ax.legend(fontsize="small")
    fig.tight_layout()
    _savefig(fig, path)
    plt.close(fig)


# ------------------------------------------------------------------ thermo

def _naming_file(path, fn, *a, **kw):
    """Run an analysis; a refusal at evaluation names the model file."""
    try:
        return fn(*a, **kw)
    except EvaluationError as exc:
        if str(path) in str(exc):
            raise
        raise EvaluationError(f"{path}: {exc}") from None


def cmd_thermo(args) -> int:
    from treeflux.runtime.analysis import thermodynamics
    from .structure import detailed_balance
    values = _values(args)
    scheme, model = _compile(args.model, args.method, args.backend)
    verdict = detailed_balance(scheme)
    r = _naming_file(args.model, thermodynamics, model, values, balanced=verdict["verdict"] is True)
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
    sigma, err = r["entropy_production"], r["entropy_production_error"]
    print(f"thermodynamics of {scheme.name} at the given values (model predictions):")
    if sigma is None:
        print(f"  entropy production: {r['entropy_production_note']}")
    else:
        bound = f" ± {err:.2g}" if err is not None else " (no error bound)"
        print(f"  entropy production: {sigma:.10g}{bound} k_B per unit time")
    print(f"  {r['error_note']}")
    print("  net fluxes:")
    for k, v in r["fluxes"].items():
        print(f"    {k:<20} {v:.10g}")
    if r["one_way_edges"]:
        print(f"  one-way at these values: {', '.join(r['one_way_edges'])}")
    if r["absent_edges"]:
        print(f"  absent (zero rate) at these values: {', '.join(r['absent_edges'])}")
    if r["affinities"]:
        print("  cycle affinities:")
        for c in r["affinities"]:
            a = c["affinity"]
            print(f"    {'->'.join(c['states'] + c['states'][:1]):<30} "
                  f"{_g(a) if a is not None else c.get('note', 'undefined')}")
    if "entropy_production_cycles" in r:
        e = r["entropy_production_cycles_error"]
        print(f"  entropy production from the cycle basis: {r['entropy_production_cycles']:.10g}"
              + (f" ± {e:.2g}" if e is not None else ""))
    db = r["detailed_balance"]
    print(f"  detailed balance: {db['verdict']} ({db['reason']}); at these values: "
          f"{db['holds_at_values']} ({db['numeric_reason']})")
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
    r = _naming_file(args.model, mean_first_passage, model, values, source=args.source, targets=targets)
    if args.json:
        _emit(r)
        return 0
    t = r["mean_time"]
    print(f"mean first-passage time {args.source} -> {{{', '.join(targets)}}}: "
          f"{'infinite' if t is None else f'{t:.10g}'} (model prediction)")
    if r["absent_edges"]:
        print(f"  absent (zero rate) at these values: {', '.join(r['absent_edges'])}")
    if "trapped_in" in r:
        print(f"  infinite: the chain can reach {', '.join(r['trapped_in'])}, from which no target is reachable")
    if "absorption" in r:
        print("  probability of reaching each target first:")
        for k, v in r["absorption"].items():
            print(f"    {k:<20} {v:.10g}")
        if r["never"]:
            print(f"    {'(none, trapped)':<20} {r['never']:.10g}")
    return 0


# ------------------------------------------------------------------ sample

def cmd_sample(args) -> int:
    import numpy as np
    from treeflux.runtime.analysis import sample, write_table
    _check_outputs(args)
    spec = [args.observable, args.input, args.range]
    if any(v is not None for v in spec) and not all(v is not None for v in spec):
        raise EvaluationError("--observable, --input and --range go together: give all three or none")
    response = None
    if args.range is not None:
        lo, hi = parse_range(args.range)
        response = {"observable": args.observable, "input": args.input, "lo": lo, "hi": hi,
                    "points": args.points}
    plt = _pyplot() if args.plot else None
    values = _values(args)
    _, model = _compile(args.model, args.method, args.backend)
    r = sample(model, args.n, seed=args.seed, values=values, response=response,
               workers=args.workers, scheduler=args.scheduler,
               rebuild=partial(_rebuild, args.model, args.method, args.backend))
    if args.out:
        write_table(r, args.out)
    if plt is not None:
        _plot_samples(plt, r, args.plot)
    if args.json:
        summary = {"n": args.n, "seed": args.seed, "columns": r["columns"], "ranges": r["ranges"],
                   "fixed": r["fixed"], "response": r["response"], "out": args.out,
                   "plot": args.plot, "note": r["note"]}
        data = r["data"]
        summary["summary"] = {}
        for c, name in enumerate(r["columns"]):
            col = data[:, c][np.isfinite(data[:, c])]
            summary["summary"][name] = ({"min": col.min(), "median": float(np.median(col)),
                                         "max": col.max(), "count": int(col.size)} if col.size
                                        else {"count": 0})
        if not args.out:
            summary["rows"] = data
        _emit(summary)
    elif not args.out:
        sys.stdout.write(",".join(r["columns"]) + "\n")
        for row in r["data"]:
            sys.stdout.write(",".join(f"{v:.17g}" for v in row) + "\n")
    else:
        print(f"wrote {args.n} samples ({len(r['columns'])} columns) to {args.out}")
    return 0


def _plot_samples(plt, r, path):
    import numpy as np
    cols, data = r["columns"], r["data"]
    fig, ax = plt.subplots(figsize=(6, 4))
    if r["response"] is not None:
        x, y = data[:, cols.index("ec50")], data[:, cols.index("hill_effective")]
        ok = np.isfinite(x) & np.isfinite(y)
        ax.scatter(x[ok], y[ok], s=4, alpha=0.5)
        ax.set_xscale("log")
        ax.set_xlabel(f"EC50 of {r['response']['observable']} in {r['response']['input']}")
        ax.set_ylabel("effective Hill coefficient")
    else:
        outputs = [c for c in cols if c not in r["ranges"]]
        for name in outputs[:8]:
            ax.hist(data[:, cols.index(name)], bins=40, histtype="step", label=name)
        ax.set_xlabel("value (model prediction)")
        ax.set_ylabel("samples")
        ax.legend(fontsize="small")
    fig.tight_layout()
    _savefig(fig, path)
    plt.close(fig)


# ------------------------------------------------------------------ fit

def cmd_fit(args) -> int:
    from treeflux.runtime.analysis import fit, read_table
    values = _values(args)
    data = read_table(args.data)
    _, model = _compile(args.model, args.method, args.backend)
    r = fit(model, data, values=values, starts=args.starts, seed=args.seed, profile=args.profile)
    if args.json:
        _emit(r)
        return 0
    _print_fit(r)
    return 0


def _print_fit(r) -> None:
    print(f"fit of {len(r['parameters'])} parameters to {r['n_residuals']} values "
          f"(cost {r['cost']:.6g}; {r['message']}; best-fit parameters of the model):")
    for k, v in r["parameters"].items():
        u = r["uncertainties"][k]
        print(f"  {k:<16} {v:.6g}" + (f" ± {u:.3g}" if u is not None else " (uncertainty undetermined)")
              + ("  at a bound" if k in r["at_bounds"] else ""))
    dof = r["degrees_of_freedom"]
    print(f"  degrees of freedom: {dof} ({r['n_residuals']} residuals - {r['n_free']} parameters)"
          + ("" if r["residual_variance"] is None else f"; residual variance {r['residual_variance']:.4g}"))
    ident = r["identifiability"]
    print(f"  identifiability: {ident['message']}")
    if ident["unidentifiable"]:
        for item in ident["identifiable"]:
            name = item["expression"] or "(" + ", ".join(f"{k}^{v:g}" for k, v in item["exponents"].items()) + ")"
            if "value" in item:
                print(f"    {name:<22} {item['value']:.6g} (standard error of its ln "
                      f"{item['log_uncertainty']:.3g})")
    if r["correlations"] is None:
        print("  correlations: undetermined (the covariance is singular)" if dof > 0 else
              "  correlations: undetermined (no degrees of freedom)")
    elif r["correlations"]:
        print("  correlations above 0.9 (of ln parameters):")
        for c in r["correlations"]:
            print(f"    {c['a']} ~ {c['b']}: {c['r']:+.4f}")
    else:
        print("  correlations: none above 0.9 in magnitude")
    for q, pr in (r.get("profiles") or {}).items():
        _print_profile(q, pr)
    print(f"  uncertainties: {r['uncertainty_method']}")


def _print_profile(q, pr) -> None:
    if pr.get("threshold_delta_cost") is None:
        print(f"  profile of {q}: {pr['note']}")
        return
    lo = "open" if pr["lower_open"] else f"{pr['lower']:.6g}"
    hi = "open" if pr["upper_open"] else f"{pr['upper']:.6g}"
    print(f"  profile-likelihood {100 * pr['level']:g}% interval of {q}: [{lo}, {hi}]"
          + ("" if pr["wald_interval"] is None else
             f" (linearized: [{pr['wald_interval'][0]:.6g}, {pr['wald_interval'][1]:.6g}])"))
    for side, note in pr["notes"].items():
        print(f"    {side} end {note}")
    if "warning" in pr:
        print(f"    warning: {pr['warning']}")


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


def register(subparsers) -> None:
    """Add the analysis subcommands to an argparse sub-parsers object."""
    q = subparsers.add_parser("response", help="response curve of an observable to one input")
    _common(q)
    q.add_argument("--observable", required=True, help="observable (or state) name")
    q.add_argument("--input", required=True, help="symbol to sweep")
    q.add_argument("--range", required=True, metavar="LO:HI",
                   help="input range, LO < HI (a negative LO works too: --range -120:60)")
    # argparse takes "-120:60" for an option unless it looks like a negative
    # number to this (private, long-standing) matcher: widen it to LO:HI ranges.
    q._negative_number_matcher = re.compile(r"^-\d+$|^-\d*\.\d+$|^-\.?\d[\d.eE+-]*:")
    q.add_argument("--points", type=_positive_int, default=61, help="grid points")
    q.add_argument("--normalize", default="limits", choices=["limits", "range"],
                   help="normalize to the limits at the ends of the input's domain (default) "
                        "or to the extremes over the range")
    q.add_argument("--spacing", default="auto", choices=["auto", "log", "linear"],
                   help="grid spacing; auto: log when 0 < LO and the input is not signed")
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
    q.add_argument("--n", type=_positive_int, required=True, help="number of samples")
    q.add_argument("--seed", type=int, default=0)
    where = q.add_mutually_exclusive_group()
    where.add_argument("--workers", type=_positive_int, help="processes of a local pool")
    where.add_argument("--scheduler", metavar="ADDR", help="dask.distributed scheduler address")
    q.add_argument("--observable", help="with --input and --range: summarize response curves")
    q.add_argument("--input")
    q.add_argument("--range", metavar="LO:HI")
    q.add_argument("--points", type=_positive_int, default=41, help="grid points per response curve")
    q.add_argument("--out", metavar="FILE", help="write the table (.csv, or .npz) atomically")
    q.add_argument("--plot", metavar="FILE.png", help="draw the samples (needs matplotlib)")
    q.add_argument("--json", action="store_true", help="print a JSON summary")
    q.set_defaults(handler=cmd_sample)

    q = subparsers.add_parser("fit", help="fit bounded parameters to measured observables")
    _common(q)
    q.add_argument("data", help="CSV: symbol columns, observable columns, optional sigma_<observable>")
    q.add_argument("--starts", type=_positive_int, default=1, help="starting points (extra ones random)")
    q.add_argument("--seed", type=int, default=0)
    q.add_argument("--profile", metavar="K1,K2", help="profile-likelihood 95%% intervals of these "
                   "fitted parameters (each fixed on a grid, the others re-fitted)")
    q.add_argument("--json", action="store_true")
    q.set_defaults(handler=cmd_fit)
