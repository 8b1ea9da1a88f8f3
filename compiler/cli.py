"""The `treeflux` command.

Every refusal prints one line on stderr and exits with status 2; ``--json``
output is one JSON object on stdout.
"""

from __future__ import annotations

import argparse
import json
import math
import os
import sys
from pathlib import Path

from treeflux.runtime.errors import TreefluxError

EXAMPLES = Path(__file__).resolve().parent.parent / "examples"


class UsageError(TreefluxError, ValueError):
    pass


def load_model(path):
    from .parse import load
    return load(path)


def parse_sets(items) -> dict[str, float]:
    """``["k1=2", "c=1e-3"]`` → {"k1": 2.0, "c": 0.001}; one-line errors."""
    values = {}
    for item in items or []:
        name, sep, text = item.partition("=")
        if not sep or not name.strip():
            raise UsageError(f"--set {item!r}: expected NAME=VALUE")
        try:
            v = float(text)
        except ValueError:
            raise UsageError(f"--set {item!r}: {text!r} is not a number") from None
        if not math.isfinite(v):
            raise UsageError(f"--set {item!r}: value must be finite")
        values[name.strip()] = v
    return values


def json_clean(obj):
    """JSON-safe copy: numpy scalars and arrays to Python, non-finite floats to None."""
    import numpy as np
    if isinstance(obj, dict):
        return {str(k): json_clean(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [json_clean(v) for v in obj]
    if isinstance(obj, np.ndarray):
        return json_clean(obj.tolist())
    if isinstance(obj, np.generic):
        obj = obj.item()
    if isinstance(obj, float) and not math.isfinite(obj):
        return None
    return obj


def emit_json(obj) -> None:
    """One JSON object on stdout (strict JSON: no NaN or Infinity)."""
    sys.stdout.write(json.dumps(json_clean(obj), indent=2, allow_nan=False) + "\n")


# ---------------------------------------------------------------- commands

def cmd_profile(args) -> int:
    from .profiler import profile
    prof = profile(load_model(args.model), method=args.method)
    if args.json:
        emit_json(prof)
        return 0
    print(f"scheme {prof['name']}: {len(prof['states'])} states, {prof['edges']} edges, "
          f"symbols: {', '.join(prof['symbols'])}")
    print(f"  strongly connected: {prof['strongly_connected']}; reversible: {prof['reversible']}; "
          f"detailed balance: {prof['detailed_balance']}")
    for cond in prof.get("detailed_balance_conditions", []):
        print(f"    condition: {cond}")
    print(f"  terminal components: {prof['terminal_components']}")
    if prof["trees"]:
        for s, c in prof["trees"].items():
            print(f"  trees rooted at {s}: {c}")
    print(f"  method: {prof['method']} ({prof['plan'].get('why', 'requested')})")
    print(f"  operations: {prof['operations']}")
    if "note" in prof:
        print(f"  note: {prof['note']}")
    return 0


def cmd_eval(args) -> int:
    from .pipeline import compile_scheme
    scheme = load_model(args.model)
    values = parse_sets(args.set)
    model = compile_scheme(scheme, method=args.method, backend=args.backend)
    P = model.steady_state(values)[0]
    obs = model.observables(values)[0] if model.observable_names else []
    used = dict(zip(model.symbols, model.as_array(values)[0].tolist()))
    if args.json:
        emit_json({"values": used, "method": model.method,
                   "steady_state": dict(zip(model.states, P.tolist())),
                   "observables": dict(zip(model.observable_names, list(obs))),
                   "note": "model predictions of the scheme, not measurements"})
        return 0
    print(f"steady state of {scheme.name} (model prediction; method {model.method}):")
    width = max(len(s) for s in model.states)
    for s, p in zip(model.states, P):
        print(f"  {s:<{width}}  {p:.6g}")
    for o, v in zip(model.observable_names, obs):
        print(f"  observable {o}: {v:.6g}")
    return 0


def cmd_formula(args) -> int:
    from .formula import coefficient_form, shared_form, substituted
    from .pipeline import plan
    scheme = load_model(args.model)
    sets = parse_sets(args.set)
    if args.collect:
        names = [c.strip() for c in args.collect.split(",") if c.strip()]
        text = coefficient_form(scheme, collect=names, state=args.state, observable=args.observable,
                                sets=sets, latex=args.latex)
    else:
        method = "trees" if args.expand else args.method
        if method in ("auto", "numeric"):
            chosen = plan(substituted(scheme, sets), "auto").method
            method = "equilibrium" if chosen == "equilibrium" else "elimination"
        text = shared_form(scheme, state=args.state, observable=args.observable, method=method,
                           sets=sets, latex=args.latex)
    sys.stdout.write(text)
    return 0


def cmd_compile(args) -> int:
    from treeflux.runtime.safe_io import OutputError
    from .pipeline import emit
    out = Path(args.out)
    if os.path.lexists(out) and not out.is_dir():
        raise OutputError(f"cannot write into {out}: it exists and is not a folder")
    scheme = load_model(args.model)
    written = emit(scheme, args.target, args.out, method=args.method)
    for p in written:
        print(p)
    return 0


def cmd_cache(args) -> int:
    from treeflux.runtime import cache
    if args.action == "info":
        emit_json(cache.info())
        return 0
    counts = cache.clear()
    line = f"removed {counts['removed']} entries from {cache.root()}"
    if counts["in_use"]:
        line += f"; kept {counts['in_use']} in use by running processes"
    if counts["kept"]:
        line += f"; left {counts['kept']} items alone that are not provably treeflux's (see cache info)"
    print(line)
    return 0


def cmd_demo(args) -> int:
    import numpy as np
    from .pipeline import compile_scheme
    from .profiler import profile

    path = EXAMPLES / "promoter_two_activators.toml"
    scheme = load_model(path)
    prof = profile(scheme)
    print(f"treeflux demo: {scheme.name} ({path.name})")
    print(f"  {len(prof['states'])} states, {prof['edges']} edges; detailed balance: "
          f"{prof['detailed_balance']}; method chosen: {prof['method']}")
    counts = prof["trees"] or {}
    if counts:
        print(f"  spanning trees per state: {min(counts.values(), key=int)} to {max(counts.values(), key=int)}")
    print(f"  operations after simplification: {prof['operations']['total']}")
    model = compile_scheme(scheme, backend="python")
    P = model.steady_state({})[0]
    print("  steady state at the model's values (model prediction):")
    for s, p in zip(model.states, P):
        print(f"    {s:<12} {p:.5f}")
    if model.observable_names and model.info.inputs:
        from treeflux.runtime.analysis import response_curve
        obs, inp = model.observable_names[0], model.info.inputs[0]
        lo, hi = scheme.symbol(inp).min or 1e-3, scheme.symbol(inp).max or 1e3
        r = response_curve(model, observable=obs, input=inp, lo=lo, hi=hi, points=81)
        print(f"  response of {obs} to {inp} over [{lo:g}, {hi:g}]: EC50 = {r['ec50']:.4g}, "
              f"effective Hill coefficient = {r['hill_effective']:.3f}, "
              f"steepest log-slope {r['max_log_slope']:.3f} at {r['max_log_slope_at']:.4g}")
    X = model.as_array({})
    X = np.repeat(X, 100_000, axis=0)
    import time
    t = time.perf_counter()
    model.steady_state(X)
    dt = time.perf_counter() - t
    print(f"  python back end: {1e9 * dt / X.shape[0]:.0f} ns per parameter set on 100,000 sets")
    return 0


def build_parser() -> argparse.ArgumentParser:
    methods = ["auto", "trees", "elimination", "equilibrium", "numeric"]
    p = argparse.ArgumentParser(prog="treeflux", description="Closed-form steady states of kinetic schemes, compiled.")
    sub = p.add_subparsers(dest="command", required=True)

    q = sub.add_parser("profile", help="structure, tree counts, method choice and operation counts")
    q.add_argument("model")
    q.add_argument("--method", default="auto", choices=methods)
    q.add_argument("--json", action="store_true")
    q.set_defaults(handler=cmd_profile)

    q = sub.add_parser("eval", help="evaluate the steady state at given values")
    q.add_argument("model")
    q.add_argument("--set", action="append", metavar="NAME=VALUE")
    q.add_argument("--method", default="auto", choices=methods)
    q.add_argument("--backend", default="python", choices=["python", "c", "cython", "llvm"])
    q.add_argument("--json", action="store_true")
    q.set_defaults(handler=cmd_eval)

    q = sub.add_parser("formula", help="closed form of the steady state (shared form, or polynomial "
                                      "coefficients with --collect)")
    q.add_argument("model")
    q.add_argument("--state")
    q.add_argument("--observable")
    q.add_argument("--set", action="append", metavar="NAME=VALUE", help="substitute a value first (P=0)")
    q.add_argument("--collect", metavar="C1,C2", help="numerator and denominator as polynomials in these")
    q.add_argument("--latex", action="store_true")
    q.add_argument("--expand", action="store_true", help="sums over spanning trees instead of elimination")
    q.add_argument("--method", default="auto", choices=methods)
    q.set_defaults(handler=cmd_formula)

    q = sub.add_parser("compile", help="write standalone source for another codebase")
    q.add_argument("model")
    q.add_argument("--target", required=True, choices=["python", "c", "cython", "llvm"])
    q.add_argument("-o", "--out", required=True)
    q.add_argument("--method", default="auto", choices=methods)
    q.set_defaults(handler=cmd_compile)

    q = sub.add_parser("cache", help="inspect or clear the compile cache")
    q.add_argument("action", choices=["info", "clear"])
    q.set_defaults(handler=cmd_cache)

    q = sub.add_parser("demo", help="profile, compile and evaluate a bundled example")
    q.set_defaults(handler=cmd_demo)

    try:
        from . import cli_analysis
    except ImportError:
        cli_analysis = None
    if cli_analysis is not None:
        cli_analysis.register(sub)
    from . import cli_language
    cli_language.register(sub)
    return p


def main(argv=None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    try:
        return int(args.handler(args) or 0)
    except TreefluxError as exc:
        print(f"treeflux: {exc}", file=sys.stderr)
        return 2
    except OSError as exc:
        print(f"treeflux: {exc}", file=sys.stderr)
        return 2
    except RecursionError:
        print("treeflux: expression too deep to process", file=sys.stderr)
        return 2


if __name__ == "__main__":
    sys.exit(main())
