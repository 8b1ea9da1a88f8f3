"""The `treeflux` command.

Every refusal prints one line on stderr and exits with status 2; ``--json``
output is one JSON object on stdout.
"""

from __future__ import annotations

import argparse
import io
import json
import math
import os
import sys
from pathlib import Path

from treeflux.runtime.errors import TreefluxError

EXAMPLES = Path(__file__).resolve().parent.parent / "examples"


class UsageError(TreefluxError, ValueError):
    pass


_LOADED: dict = {}


def load_model(path):
    """Load a model file; the same unchanged file is parsed once per process
    (the request guards read it before the command does)."""
    from .parse import load
    try:
        st = os.stat(path)
        key = (os.path.realpath(path), st.st_mtime_ns, st.st_size)
    except (OSError, TypeError, ValueError):
        return load(path)
    if key not in _LOADED:
        _LOADED.clear()
        _LOADED[key] = load(path)
    return _LOADED[key]


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
    if prof.get("trees_note"):
        print(f"  trees: {prof['trees_note']}")
    if prof["method"] is None:
        print(f"  method: none fits: {prof['refused']}")
        return 0
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


class _Parser(argparse.ArgumentParser):
    """argparse with one-line errors (no usage block): ``treeflux: error: ...``, exit 2."""

    def error(self, message):
        raise UsageError(f"{message} (see `{self.prog} --help`)")


def _quiet(q) -> None:
    q.add_argument("--quiet", action="store_true", help="no progress bars")


def build_parser() -> argparse.ArgumentParser:
    methods = ["auto", "trees", "elimination", "equilibrium", "numeric"]
    p = _Parser(prog="treeflux", description="Closed-form steady states of kinetic schemes, compiled.")
    sub = p.add_subparsers(dest="command", required=True)

    q = sub.add_parser("profile", help="structure, tree counts, method choice and operation counts")
    q.add_argument("model")
    q.add_argument("--method", default="auto", choices=methods)
    q.add_argument("--json", action="store_true")
    _quiet(q)
    q.set_defaults(handler=cmd_profile)

    q = sub.add_parser("eval", help="evaluate the steady state at given values")
    q.add_argument("model")
    q.add_argument("--set", action="append", metavar="NAME=VALUE")
    q.add_argument("--method", default="auto", choices=methods)
    q.add_argument("--backend", default="python", choices=["python", "c", "cython", "llvm"])
    q.add_argument("--json", action="store_true")
    _quiet(q)
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
    _quiet(q)
    q.set_defaults(handler=cmd_formula)

    q = sub.add_parser("compile", help="write standalone source for another codebase")
    q.add_argument("model")
    q.add_argument("--target", required=True, choices=["python", "c", "cython", "llvm"])
    q.add_argument("-o", "--out", required=True)
    q.add_argument("--method", default="auto", choices=methods)
    _quiet(q)
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


def _one_line(text) -> str:
    """A message as one printable line: control characters and escapes shown, not obeyed."""
    text = " ".join(str(text).split())
    return "".join(ch if ch.isprintable() else repr(ch)[1:-1] for ch in text)


def _say(message) -> None:
    try:
        sys.stderr.write(f"treeflux: {_one_line(message)}\n")
        sys.stderr.flush()
    except (OSError, ValueError):
        pass


def _compile_error(exc) -> str:
    """A failing or missing C compiler: name it, with its first error line."""
    cc = os.environ.get("CC", "cc")
    text = (str(exc).strip().splitlines() or ["no message"])[0]
    return text if cc in text else f"{text} (compiler: {cc})"


def _quiet_stdout() -> None:
    """After a closed pipe: point stdout at /dev/null so the interpreter's final
    flush cannot fail again (the recipe of the Python docs, signal module, SIGPIPE)."""
    try:
        devnull = os.open(os.devnull, os.O_WRONLY)
        os.dup2(devnull, sys.stdout.fileno())
    except (OSError, ValueError, AttributeError):
        pass


def _run(argv) -> int:
    args = build_parser().parse_args(argv)
    if getattr(args, "quiet", False) or getattr(args, "json", False):
        from treeflux.runtime.progress import set_enabled
        set_enabled(False)
    guard = getattr(args, "guard", None)
    if guard is not None:
        guard(args)
    # Output is held until the command succeeds: an error or Ctrl-C leaves no partial output.
    real, held = sys.stdout, io.StringIO()
    sys.stdout = held
    try:
        status = int(args.handler(args) or 0)
    finally:
        sys.stdout = real
    text = held.getvalue()
    # In pieces: a reader that goes away mid-way (`| head`) shows as a BrokenPipeError
    # on the next piece (one huge write can end short without an error).
    for a in range(0, len(text), 1 << 16):
        real.write(text[a:a + (1 << 16)])
        real.flush()
    return status


def main(argv=None) -> int:
    """The command line; every failure is one line on stderr.

    Exit status: 0 success; 2 bad input or a refused request (treeflux's own
    errors, unreadable files, a failing C compiler, out of memory); 130
    interrupted (Ctrl-C); 1 an internal error (a bug: set TREEFLUX_DEBUG=1 for
    the traceback) or a closed output pipe.
    """
    from treeflux.runtime.cache import CompileError

    debug = os.environ.get("TREEFLUX_DEBUG", "") not in ("", "0")
    try:
        return _run(argv)
    except KeyboardInterrupt:
        _say("interrupted")
        return 130
    except BrokenPipeError:
        _quiet_stdout()
        return 1
    except SystemExit as exc:          # --help and --version exit through argparse
        return exc.code if isinstance(exc.code, int) else 0
    except Exception as exc:           # noqa: BLE001 — every failure becomes one line
        if debug:
            raise
        if isinstance(exc, CompileError):  # a TreefluxError too: name the compiler first
            _say(_compile_error(exc))
            return 2
        if isinstance(exc, TreefluxError):
            _say(exc)
            return 2
        if isinstance(exc, MemoryError):
            _say("out of memory: the request needs more memory than is available "
                 "(ask `treeflux profile` for the size estimates)")
            return 2
        if isinstance(exc, RecursionError):
            _say("expression too deep to process")
            return 2
        if isinstance(exc, OSError):
            where = f"{exc.filename}: " if getattr(exc, "filename", None) else ""
            _say(f"{where}{exc.strerror or exc}")
            return 2
        _say(f"internal error: {type(exc).__name__}: {exc} (a bug in treeflux; please report it "
             f"with the command; TREEFLUX_DEBUG=1 shows the traceback)")
        return 1


if __name__ == "__main__":
    sys.exit(main())
