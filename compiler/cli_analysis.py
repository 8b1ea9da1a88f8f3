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

from treeflux.runtime.errors import EvaluationError

METHODS = ["auto", "trees", "elimination", "equilibrium", "numeric"]
BACKENDS = ["python", "c", "cython", "llvm"]


# ------------------------------------------------------------------ helpers

def _cli():
    from . import cli
    return cli


def _compile(path, method="auto", backend="python", jacobian=False):
    """Load a model file and compile it (module level: picklable for workers)."""
    from .pipeline import compile_scheme
    scheme = _cli().load_model(path)
    return scheme, compile_scheme(scheme, method=method, backend=backend, jacobian=jacobian)


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
        fig.savefig(tmp, dpi=120, format=Path(path).suffix[1:].lower(), bbox_inches="tight")


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
    scheme, model = _compile(args.model, args.method, args.backend)
    options = dict(observable=args.observable, input=args.input, lo=lo, hi=hi, points=args.points,
                   normalization=args.normalize, spacing=args.spacing)
    other = _comparison_model(args, scheme)
    r = response_curve(model, values=values, **options)
    if other is not None:
        comparison, model2 = other
        values2 = _values_for(model2, values, comparison)
        comparison["result"] = _naming_file(comparison["model"], response_curve, model2,
                                            values=values2, **options)
        r["comparison"] = comparison
    if plt is not None:
        if other is None:
            _plot_response(plt, r, args.plot)
        else:
            _plot_response_pair(plt, r, scheme.name, args.plot)
        r["plot"] = str(args.plot)
    if args.json:
        _emit(r)
        return 0
    _print_response(r)
    if other is not None:
        print(f"\ncompared with the {r['comparison']['label']}:")
        _print_response(r["comparison"]["result"])
    return 0


# ------------------------------------------------------------------ comparison overlays

def _comparison_model(args, scheme):
    """The second model to overlay (``--compare-equilibrium`` or ``--with OTHER``):
    (description dict, compiled model), or None. Compiled models pickle as their
    scheme and options, so workers rebuild either one."""
    if getattr(args, "compare_equilibrium", False):
        from .balance import equilibrium_restriction
        from .pipeline import compile_scheme
        restricted = equilibrium_restriction(scheme)
        model = compile_scheme(restricted, method=args.method, backend=args.backend)
        return ({"label": "equilibrium restriction", "kind": "equilibrium_restriction",
                 "model": str(args.model), "name": restricted.name,
                 "restricted_edges": list(restricted.restricted_edges)}, model)
    if getattr(args, "with_model", None):
        other, model = _compile(args.with_model, args.method, args.backend)
        return ({"label": other.name or str(args.with_model), "kind": "model",
                 "model": str(args.with_model), "name": other.name}, model)
    return None


def _values_for(model, values: dict, comparison: dict) -> dict:
    """``--set`` values that the second model has; the others are listed in the comparison."""
    missing = [k for k in values if k not in model.symbols]
    if missing:
        comparison["values_not_in_model"] = missing
    return {k: v for k, v in values.items() if k in model.symbols}


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


def _plot_response_pair(plt, r, name, path) -> None:
    """A scheme and its comparison on the same axes: the observable (left) and
    the observable normalized to its limits (right), with a legend."""
    import numpy as np
    other = r["comparison"]
    fig, axes = plt.subplots(1, 2, figsize=(10.5, 4.4))
    for res, label, style, color in ((r, name or "scheme", "-", "C0"),
                                     (other["result"], other["label"], "--", "C3")):
        x = np.array(res["curve"]["x"])
        h = res.get("hill_effective")
        for ax, key in zip(axes, ("y", "y_normalized")):
            ax.plot(x, np.array(res["curve"][key], dtype=float), style, lw=2, color=color,
                    label=label if key == "y" or h is None else f"{label}: effective Hill {h:.3g}")
    for ax, what in zip(axes, ("value", "normalized to its " + (
            "range" if r["normalization"] == "range" else "limits"))):
        if r["spacing"] == "log":
            ax.set_xscale("log")
        ax.set_xlabel(f"{r['input']} ({r['spacing']} scale)")
        ax.set_ylabel(f"{r['observable']}, {what}")
        ax.legend(fontsize="small")
    fig.suptitle(f"Model predictions: response of {r['observable']} to {r['input']}, "
                 f"compared with the {other['label']}", fontsize=10)
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
    from treeflux.runtime import progress, safe_io
    from treeflux.runtime.sampling import sample, summarize, write_csv, write_table
    _check_outputs(args)
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
    scheme, model = _compile(args.model, args.method, args.backend)
    other = _comparison_model(args, scheme)
    out2 = _comparison_out(args.out) if other is not None and args.out else None
    if out2 is not None:
        safe_io.check_target(out2)
    options = dict(seed=args.seed, response=response, workers=args.workers, scheduler=args.scheduler)
    written = None
    r2 = comparison = None
    try:
        r = sample(model, args.n, values=values, **options)
        if other is not None:
            comparison, model2 = other
            values2 = _values_for(model2, values, comparison)
            r2 = _naming_file(comparison["model"], sample, model2, args.n, values=values2, **options)
            # same seed, same parameter names in the same order: row i of both tables has the same draws
            comparison["paired"] = r2["columns"][:len(r2["ranges"])] == r["columns"][:len(r["ranges"])]
        if args.out:
            if r2 is None:
                written = write_table(r, args.out)
            else:
                _write_tables(r, args.out, r2, out2)
                written = f"{args.out} and {out2}"
        if plt is not None:
            _plot_samples(plt, r, args.plot, r2, (scheme.name or "scheme", comparison))
    except KeyboardInterrupt:   # the cluster is closed and no partial file is left by now
        print(f"treeflux: interrupted; {f'only {written} was written' if written else 'nothing was written'}",
              file=sys.stderr)
        return 130
    stats = summarize(r)
    stats2 = summarize(r2) if r2 is not None else None
    if args.json:
        summary = _sample_json(r, stats, args.out)
        summary.update({"n": args.n, "seed": args.seed, "plot": args.plot})
        if comparison is not None:
            comparison.update(_sample_json(r2, stats2, out2))
            summary["comparison"] = comparison
        _emit(summary)
    elif not args.out:
        write_csv(r, sys.stdout)
        if r2 is not None:
            sys.stdout.write(f"# comparison: {comparison['label']} ({comparison['model']})\n")
            write_csv(r2, sys.stdout)
    else:
        print(f"wrote {args.n} samples ({len(r['columns'])} columns) to {args.out} (model predictions)"
              + ("" if r2 is None else f"; the {comparison['label']}'s to {out2}"))
        _print_sample_summary(r, stats)
        if r2 is not None:
            print(f"{comparison['label']}:")
            _print_sample_summary(r2, stats2)
    return 0


def _sample_json(r, stats, out) -> dict:
    """The JSON summary of one sample table (rows included when not written to a file)."""
    summary = {"columns": r["columns"], "ranges": r["ranges"], "fixed": r["fixed"],
               "response": r["response"], "out": out, "note": r["note"], "summary": stats["columns"]}
    if "curves" in stats:
        summary["curves"] = stats["curves"]
    if not out:
        summary["rows"] = r["data"]
    return summary


def _comparison_out(path) -> str:
    """``samples.csv`` → ``samples.comparison.csv``: where the comparison's table goes."""
    from pathlib import Path
    p = Path(path)
    return str(p.with_name(f"{p.stem}.comparison{p.suffix}"))


def _write_tables(r, path, r2, path2) -> None:
    """Write the table(s); with a comparison both or neither (safe_io.write_files)."""
    from treeflux.runtime.analysis import write_table
    if r2 is None:
        write_table(r, path)
        return
    import tempfile
    from pathlib import Path
    from treeflux.runtime.safe_io import write_files
    with tempfile.TemporaryDirectory() as tmp:
        blobs = {}
        for res, target in ((r, path), (r2, path2)):
            staged = Path(tmp) / f"{len(blobs)}{Path(target).suffix}"
            write_table(res, staged)
            blobs[target] = staged.read_bytes()
        write_files(blobs)


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


def _plot_samples(plt, r, path, r2=None, labels=("scheme", None)):
    import numpy as np
    fig, ax = plt.subplots(figsize=(7, 5.5))
    runs = [(r, labels[0], "C0", "-")]
    if r2 is not None:
        runs.append((r2, labels[1]["label"], "C3", "--"))
    if r["response"] is not None:
        for res, label, color, _ in runs:
            cols, data = res["columns"], res["data"]
            x, y = data[:, cols.index("ec50")], data[:, cols.index("hill_effective")]
            ok = np.isfinite(x) & np.isfinite(y)
            sat = data[:, cols.index("saturated")] == 1
            tag = "" if r2 is None else f"{label}: "
            ax.scatter(x[ok & sat], y[ok & sat], s=4, alpha=0.5, color=color,
                       label=f"{tag}saturated within the range ({int((ok & sat).sum())})")
            ax.scatter(x[ok & ~sat], y[ok & ~sat], s=6, facecolors="none", edgecolors=color, lw=0.5,
                       alpha=0.6, label=f"{tag}not saturated: values describe the range ({int((ok & ~sat).sum())})")
        ax.set_xscale("log")
        ax.set_xlabel(f"EC50 of {r['response']['observable']} in {r['response']['input']}")
        ax.set_ylabel("effective Hill coefficient (model prediction)")
        ax.legend(fontsize="small", markerscale=2, loc="upper center", bbox_to_anchor=(0.5, -0.14))
    else:
        outputs = [c for c in r["columns"] if c not in r["ranges"]]
        shown = outputs[:8] if r2 is None else [c for c in outputs if not c.startswith("p_")][:4] or outputs[:4]
        for k, name in enumerate(shown):
            for res, label, _, style in runs:
                if name in res["columns"]:
                    ax.hist(res["data"][:, res["columns"].index(name)], bins=40, histtype="step",
                            color=f"C{k}", ls=style,
                            label=name if r2 is None else f"{name} ({label})")
        ax.set_xlabel("value (model prediction)")
        ax.set_ylabel("samples")
        ax.legend(fontsize="small")
    if r2 is not None:
        ax.set_title(f"Model predictions: {labels[0]}\nvs its {labels[1]['label']}"
                     if labels[1]["kind"] == "equilibrium_restriction"
                     else f"Model predictions: {labels[0]}\nvs {labels[1]['label']}", fontsize=9)
    fig.tight_layout()
    _savefig(fig, path)
    plt.close(fig)


# ------------------------------------------------------------------ fit

def cmd_fit(args) -> int:
    from treeflux.runtime.analysis import fit, read_table
    values = _values(args)
    data = read_table(args.data)
    from .errors import ModelError
    try:  # the compiled Jacobian where a straight-line method exists; else central differences
        _, model = _compile(args.model, args.method, args.backend, jacobian=True)
    except ModelError:
        _, model = _compile(args.model, args.method, args.backend)
    r = fit(model, data, values=values, starts=args.starts, seed=args.seed, profile=args.profile)
    if args.json:
        _emit(r)
        return 0
    _print_fit(r)
    return 0


def _print_fit(r) -> None:
    n = len(r["parameters"])
    print(f"fit of {n} parameter{'s' if n != 1 else ''} to {r['n_residuals']} values "
          f"(cost {r['cost']:.6g}; {r['message']}; best-fit parameters of the model):")
    for k, v in r["parameters"].items():
        u = r["uncertainties"][k]
        print(f"  {k:<16} {v:.6g}" + (f" ± {u:.3g}" if u is not None else " (uncertainty undetermined)")
              + ("  at a bound" if k in r["at_bounds"] else ""))
    dof = r["degrees_of_freedom"]
    print(f"  degrees of freedom: {dof} ({r['n_residuals']} residuals - {r['n_free']} "
          f"parameter{'s' if r['n_free'] != 1 else ''})"
          + ("" if r["residual_variance"] is None else f"; residual variance {r['residual_variance']:.4g}"))
    ident = r["identifiability"]
    print(f"  identifiability: {ident['message']}")
    if ident["unidentifiable"]:
        for item in ident["identifiable"]:
            name = item["expression"] or "(" + ", ".join(f"{k}^{v:g}" for k, v in item["exponents"].items()) + ")"
            if "value" in item:
                print(f"    {name:<22} {item['value']:.6g} (standard error of its ln "
                      f"{item['log_uncertainty']:.3g})")
    if n == 1:
        pass
    elif r["correlations"] is None:
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
    q.add_argument("--quiet", action="store_true", help="no progress bars")


def _positive_int(text):
    """A count ≥ 1: an integer, also written like 1e6 or 1_000_000."""
    import argparse
    t = str(text).strip()
    try:
        v = int(t)
    except ValueError:
        try:
            f = float(t)
        except ValueError:
            raise argparse.ArgumentTypeError(f"{text!r} is not an integer") from None
        if not math.isfinite(f) or f != int(f):
            raise argparse.ArgumentTypeError(f"{text!r} is not an integer") from None
        v = int(f)
    if v < 1:
        raise argparse.ArgumentTypeError(f"{text!r} must be at least 1")
    return v


def _seed(text):
    """A random seed: an integer ≥ 0 (numpy's generators refuse negative seeds)."""
    import argparse
    try:
        v = int(str(text).strip())
    except ValueError:
        raise argparse.ArgumentTypeError(f"{text!r} is not an integer") from None
    if v < 0:
        raise argparse.ArgumentTypeError(f"{text!r}: a seed must be 0 or a positive integer")
    return v


# More worker processes than this many per core only add memory and scheduling.
WORKERS_PER_CORE = 4


def _workers(text):
    """Worker processes: at least 1, at most WORKERS_PER_CORE per core of this machine."""
    import argparse
    import os
    v = _positive_int(text)
    cores = os.cpu_count() or 1
    if v > WORKERS_PER_CORE * cores:
        raise argparse.ArgumentTypeError(
            f"{v} worker processes on a machine with {cores} core{'s' * (cores != 1)}: at most "
            f"{WORKERS_PER_CORE * cores} ({WORKERS_PER_CORE} per core); for more, start a cluster "
            f"and pass --scheduler")
    return v


# ------------------------------------------------------------------ request guards
# Refuse a request whose memory exceeds what the machine has, before any work.
# Estimates are lower bounds of what the command holds at once: float64 arrays
# of inputs, probabilities and observables, the result table, and its text when
# it is printed.

def _sizes(args) -> tuple[int, int, int]:
    """(symbols, states, observables) of the model file named by the command."""
    scheme = _cli().load_model(args.model)
    return len(scheme.symbols), len(scheme.states), len(scheme.observables)


def _check_memory(what: str, need: float) -> None:
    from .errors import TooLargeError
    from treeflux.runtime.resources import available_memory, format_bytes
    avail = available_memory()
    if avail is not None and need > 0.8 * avail:
        raise TooLargeError(f"{what} needs about {format_bytes(need)} of memory; "
                            f"{format_bytes(avail)} is available")


def guard_response(args) -> None:
    n_sym, n_states, n_obs = _sizes(args)
    # per grid point: inputs, p, dp/dc, d2p/dc2 and observables (float64), and
    # the curve's x, y and normalized y as Python floats in lists (about 32 bytes each)
    per_point = 8 * (n_sym + 4 * (n_states + n_obs)) + 3 * 32 + (3 * 26 if args.json else 0)
    _check_memory(f"--points {args.points:,}", args.points * per_point)


def guard_sample(args) -> None:
    n_sym, n_states, n_obs = _sizes(args)
    width = n_sym + n_states + n_obs + (8 if args.range is not None else 0)
    # inputs, steady states and the result table in float64; printed rows as text
    # (about 26 characters a number, held until the command succeeds and copied once
    # when written: three times the text at the peak)
    per_sample = 8 * (n_sym + n_states + n_obs) + 8 * width + (0 if args.out else 3 * 26 * width)
    _check_memory(f"--n {args.n:,} samples of {width} columns", args.n * per_sample)


def _comparison_options(q) -> None:
    g = q.add_mutually_exclusive_group()
    g.add_argument("--compare-equilibrium", action="store_true",
                   help="also run the scheme restricted to detailed balance and overlay both "
                        "(JSON: a 'comparison' object)")
    g.add_argument("--with", dest="with_model", metavar="OTHER.toml",
                   help="also run a second model with the same observable and input and overlay both")


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
    _comparison_options(q)
    q.add_argument("--json", action="store_true")
    q.set_defaults(handler=cmd_response, guard=guard_response)

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
    q.add_argument("--n", type=_positive_int, required=True, help="number of samples (1e6 is accepted)")
    q.add_argument("--seed", type=_seed, default=0)
    where = q.add_mutually_exclusive_group()
    where.add_argument("--workers", type=_workers,
                       help="start a local Dask cluster of this many worker processes")
    where.add_argument("--scheduler", metavar="ADDR", help="run on the Dask scheduler at this address")
    q.add_argument("--observable", help="with --input and --range: summarize response curves")
    q.add_argument("--input")
    q.add_argument("--range", metavar="LO:HI")
    q.add_argument("--points", type=_positive_int, default=41, help="grid points per response curve")
    q.add_argument("--out", metavar="FILE", help="write the table (.csv, or .npz) atomically")
    q.add_argument("--plot", metavar="FILE.png", help="draw the samples (needs matplotlib)")
    _comparison_options(q)
    q.add_argument("--json", action="store_true", help="print a JSON summary")
    if not any("--quiet" in a.option_strings for a in q._actions):
        q.add_argument("--quiet", action="store_true", help="no progress bar")
    q.set_defaults(handler=cmd_sample, guard=guard_sample)

    q = subparsers.add_parser("fit", help="fit bounded parameters to measured observables")
    _common(q)
    q.add_argument("data", help="CSV: symbol columns, observable columns, optional sigma_<observable>")
    q.add_argument("--starts", type=_positive_int, default=1, help="starting points (extra ones random)")
    q.add_argument("--seed", type=_seed, default=0)
    q.add_argument("--profile", metavar="K1,K2", help="profile-likelihood 95%% intervals of these "
                   "fitted parameters (each fixed on a grid, the others re-fitted)")
    q.add_argument("--json", action="store_true")
    q.set_defaults(handler=cmd_fit)
