"""Run the benchmark suite and write ``benches/README.md``.

Usage (from anywhere)::

    python benches/report.py                 # run every bench_*.py, then write the README
    python benches/report.py --save-json F   # ... and keep the raw JSON in F
    python benches/report.py --from-json F   # rewrite the README from a saved run

The suite runs as ``python -m pytest benches --benchmark-only
--benchmark-json=...``; this script reads that JSON and writes the machine
(CPU, cores, memory, library versions, date, load average), then every figure
in tables with its goal beside it and whether it is met. Timings are medians
of several rounds; the machine may be shared, so the load average before and
after the run is part of the report.
"""

from __future__ import annotations

import argparse
import datetime
import json
import os
import platform
import subprocess
import sys
import tempfile
import time
from pathlib import Path

HERE = Path(__file__).resolve().parent
ROOT = HERE.parent


# ------------------------------------------------------------------ machine

def _cpuinfo() -> dict:
    info = {}
    try:
        for line in Path("/proc/cpuinfo").read_text().splitlines():
            if ":" in line:
                k, v = (s.strip() for s in line.split(":", 1))
                info.setdefault(k, v)
    except OSError:
        pass
    return info


def _meminfo_gib() -> float:
    try:
        for line in Path("/proc/meminfo").read_text().splitlines():
            if line.startswith("MemTotal"):
                return int(line.split()[1]) / 2 ** 20
    except OSError:
        pass
    return float("nan")


def _version(module: str) -> str:
    try:
        mod = __import__(module)
        return getattr(mod, "__version__", "?")
    except Exception:                       # noqa: BLE001 — a missing optional library is reported, not fatal
        return "not installed"


def _gcc() -> str:
    try:
        return subprocess.run(["gcc", "--version"], capture_output=True, text=True, check=False).stdout.splitlines()[0]
    except (OSError, IndexError):
        return "not found"


def machine() -> dict:
    cpu = _cpuinfo()
    flags = cpu.get("flags", "").split()
    llvm = "?"
    try:
        import llvmlite.binding as llvm_binding
        llvm = ".".join(map(str, llvm_binding.llvm_version_info))
    except Exception:                       # noqa: BLE001
        pass
    return {
        "cpu": f"{cpu.get('model name', platform.processor())} (family {cpu.get('cpu family', '?')}, "
               f"model {cpu.get('model', '?')}, {cpu.get('cpu MHz', '?')} MHz)",
        "simd": ", ".join(f for f in ("avx2", "fma", "avx512f", "avx512dq", "avx512vl") if f in flags),
        "cores": os.cpu_count(), "memory_gib": round(_meminfo_gib(), 1),
        "python": platform.python_version(), "numpy": _version("numpy"), "scipy": _version("scipy"),
        "sympy": _version("sympy"), "llvmlite": _version("llvmlite"), "llvm": llvm,
        "numba": _version("numba"), "cython": _version("Cython"), "gcc": _gcc(),
        "pytest_benchmark": _version("pytest_benchmark"),
        "date": datetime.datetime.now(datetime.timezone.utc).strftime("%Y-%m-%d %H:%M UTC"),
    }


# ------------------------------------------------------------------ running

def run_suite(json_path: Path) -> dict:
    cmd = [sys.executable, "-m", "pytest", str(HERE), "--benchmark-only", "-q", "-p", "no:cacheprovider",
           f"--benchmark-json={json_path}", "--benchmark-disable-gc"]
    load_before = os.getloadavg()
    t0 = time.perf_counter()
    proc = subprocess.run(cmd, cwd=ROOT, capture_output=True, text=True, check=False)
    wall = time.perf_counter() - t0
    load_after = os.getloadavg()
    tail = [line for line in proc.stdout.splitlines() if line.startswith(("FAILED", "ERROR"))
            or " passed" in line or " failed" in line]
    sys.stdout.write(proc.stdout[-3000:])
    sys.stderr.write(proc.stderr[-3000:])
    return {"command": " ".join(["python", "-m", "pytest", "benches", "--benchmark-only",
                                 "--benchmark-json=...", "--benchmark-disable-gc"]),
            "exit_status": proc.returncode, "wall_s": wall, "load_before": load_before,
            "load_after": load_after, "summary": tail}


# ------------------------------------------------------------------ formatting

def fmt(x, digits: int = 3) -> str:
    if x is None:
        return "—"
    if isinstance(x, bool):
        return "yes" if x else "no"
    if isinstance(x, int):
        return f"{x:,}"
    if isinstance(x, float):
        if x != x:
            return "nan"
        if x == 0:
            return "0"
        if abs(x) >= 1000:
            return f"{x:,.0f}"
        if abs(x) < 1e-3:
            return f"{x:.2e}"
        return f"{x:.{digits}g}"
    return str(x)


def ns(x) -> str:
    if x is None:
        return "—"
    if x >= 1e9:
        return f"{x / 1e9:.3g} s"
    if x >= 1e6:
        return f"{x / 1e6:.3g} ms"
    if x >= 1e3:
        return f"{x / 1e3:.3g} µs"
    return f"{x:.3g} ns"


def met(ok) -> str:
    return "—" if ok is None else ("**met**" if ok else "**missed**")


def table(header, rows) -> list[str]:
    out = ["| " + " | ".join(header) + " |", "|" + "---|" * len(header)]
    out += ["| " + " | ".join(fmt(c) if not isinstance(c, str) else c for c in row) + " |" for row in rows]
    return out + [""]


class Results:
    def __init__(self, data: dict):
        self.by_name = {}
        for b in data["benchmarks"]:
            self.by_name[b["fullname"].split("/")[-1]] = b

    def get(self, name: str):
        return self.by_name.get(name)

    def info(self, name: str) -> dict:
        b = self.get(name)
        return b["extra_info"] if b else {}

    def median(self, name: str):
        b = self.get(name)
        return b["stats"]["median"] if b else None

    def in_file(self, fname: str):
        return [(k, v) for k, v in self.by_name.items() if k.startswith(fname + "::")]


# ------------------------------------------------------------------ sections

LOOPED_SCHEMES = {"Q6": "Q6 (64 states, 384 edges)", "random200": "random 200 states, 600 edges",
                  "random1000": "random 1,000 states, 3,000 edges", "lattice100": "100×100 lattice (10,000 states, 39,600 edges)"}
PUBLIC_COLUMNS = ["public call", "threads", "raw kernel", "vs raw kernel", "vs numpy", "Numba loop", "vs Numba",
                  "arith. floor", "of floor", "memory floor", "of floor"]


def section_public(R: Results, goals: list) -> list[str]:
    """The lead section: what ``m.steady_state(X, out=)`` costs
    (benches/bench_public.py), against its own raw kernel and the baselines
    timed round by round in the same test, for the straight-line schemes (Q3,
    Q4, every back end) and the looped numeric path (Q6, random 200 and
    1,000 states, the 100×100 lattice)."""
    straight = _public_straight(R, goals)
    looped = _public_looped(R, goals)
    if not straight and not looped:
        return []
    lines = ["## What users get: the public call (Q3, Q4, Q6, random 200 and 1,000 states, 100×100 lattice; "
             "rates log-uniform in [1e-3, 1e3])", "",
             "`m.steady_state(X, out=out)` with everything it does — input checks, the rates from the labels "
             "(looped path), the range guard, recompute of flagged rows, the default thread count — per parameter set, beside "
             "numpy's batched dense solve and the hand-written Numba elimination loop (sets in SIMD lanes) "
             "timed in the same test. *vs raw kernel* is the public call over its own kernel without checks "
             "(the faster of 1 and 2 threads; goal ≤ 1.2× for LLVM on Q3 and Q4, ≤ 1.3× for every back end "
             "and route); *vs Numba* is the Numba loop at its faster thread count over the public call; *vs "
             "numpy* the dense solve (assembly included) over the public call. Floors: arithmetic = flops per "
             "set at 32 flops per cycle on one core, memory = 8·(n_symbols + n_states) bytes per set at the "
             "copy bandwidth of the run; *of floor* = floor / public-call time. Q3 and Q4: medians of the "
             "rounds; the looped schemes: best of the rounds (as `bench_numeric.py` times the kernel). "
             "Kernel-only figures follow the goals table.", ""]
    return lines + _public_overview(R) + straight + looped


def _public_row(e: dict, goal_mark: bool) -> list:
    """The columns of :data:`PUBLIC_COLUMNS` for one public-call record."""
    t, ratio = e["public_ns"], e["public_over_raw"]
    vs_np = e.get("numpy_over_public")
    vs_nb = f"{e['numba_over_public']:.2f}×"
    if goal_mark and e.get("goal_numba_over_public"):
        vs_nb += f" {met(e['numba_over_public'] >= e['goal_numba_over_public'])}"
    return [ns(t), f"{e.get('default_threads')}", ns(e["raw_best_ns"]),
            f"{ratio:.2f}× {met(ratio <= e.get('goal_public_over_raw', 1.3))}",
            f"{vs_np:,.0f}×" if vs_np else "—", ns(e["numba_best_ns"]), vs_nb,
            ns(e["arith_floor_ns"]), f"{e['arith_floor_fraction']:.0%}",
            ns(e["memory_floor_ns"]), f"{e['memory_floor_fraction']:.0%}"]


def _public_overview(R: Results) -> list[str]:
    """One row per scheme: the fastest public call at the large N beside numpy and Numba."""
    rows = []
    for name in ("Q3", "Q4"):
        rec = [R.info(f"bench_public.py::test_public_call[{name}-{b}-N200000]") for b in ("llvm", "c", "cython", "python")]
        rec = [e for e in rec if e]
        if rec:
            e = min(rec, key=lambda x: x["public_ns"])
            rows.append([name, "200,000", f"straight-line, {e['backend']}", e])
    for name in LOOPED_SCHEMES:
        e = R.info(f"bench_public.py::test_public_call_looped[{name}]")
        if not e:
            continue
        rows.append([name, f"{e['rows']:,}", "looped (`numeric`)", e])
        if e.get("auto"):
            rows.append([name, f"{e['rows']:,}", f"`auto`: {e['auto']['route']}", {**e, **e["auto"]}])
    if not rows:
        return []
    out = [[name, n, route, ns(e["public_ns"]), ns(e.get("numpy_dense_ns")),
            f"{e['numpy_over_public']:,.0f}×" if e.get("numpy_over_public") else "—",
            ns(e["numba_best_ns"]), f"{e['numba_over_public']:.2f}×",
            f"{e['arith_floor_fraction']:.0%}", f"{e['memory_floor_fraction']:.0%}"] for name, n, route, e in rows]
    return (["### Overview: the fastest route per scheme", "",
             "Q3 and Q4: the back end with the fastest public call at N = 200,000; the others: the looped "
             "numeric path (what `auto` picks for all but Q6, where it picks straight-line elimination: both "
             "shown). numpy: ns per set of the batched dense solve in the same test.", ""]
            + table(["scheme", "N", "route", "public call", "numpy", "vs numpy", "Numba loop", "vs Numba",
                     "of arith. floor", "of memory floor"], out))


def _public_straight(R: Results, goals: list) -> list[str]:
    """Q3 and Q4, every back end, N = 200,000 and 1,024 (``test_public_call``)."""
    lines = []
    for name in ("Q3", "Q4"):
        for rows, tag in ((200000, "N200000"), (1024, "N1024")):
            rws = []
            for backend in ("llvm", "c", "cython", "python"):
                e = R.info(f"bench_public.py::test_public_call[{name}-{backend}-{tag}]")
                if not e:
                    continue
                ratio = e["public_over_raw"]
                rws.append([backend] + _public_row(e, goal_mark=True))
                goals.append((f"{name} N = {rows:,}: public call / raw kernel, {backend}",
                              f"≤ {e['goal_public_over_raw']}×", f"{ratio:.2f}×", ratio <= e["goal_public_over_raw"]))
                if e.get("goal_numba_over_public"):
                    g = e["goal_numba_over_public"]
                    goals.append((f"{name} N = {rows:,}: public call vs the Numba loop, {backend}", f"≥ {g}×",
                                  f"{e['numba_over_public']:.2f}×", e["numba_over_public"] >= g))
            if rws:
                lines += [f"### {name}, N = {rows:,} (straight-line kernels, every back end)", ""]
                lines += table(["back end"] + PUBLIC_COLUMNS, rws)
    return lines


def _public_looped(R: Results, goals: list) -> list[str]:
    """Q6, random 200 / 1,000 states, the lattice (``test_public_call_looped``):
    the public call of ``method="numeric"``, its raw looped kernel
    (``EliminationPlan.steady_state``), the Numba loop, numpy; Q6 also ``auto``."""
    lines = []
    for name, label in LOOPED_SCHEMES.items():
        e = R.info(f"bench_public.py::test_public_call_looped[{name}]")
        if not e:
            continue
        rws = [["looped (`method=\"numeric\"`)"] + _public_row(e, goal_mark=False)]
        if e.get("auto"):
            a = {**e, **e["auto"]}
            rws.append([f"`auto`: {a['route']}"] + _public_row(a, goal_mark=False))
            goals.append((f"{name}, the `auto` route ({a['route']}): public call / raw kernel", "≤ 1.3×",
                          f"{a['public_over_raw']:.2f}×", a["public_over_raw"] <= 1.3))
        th = e["default_threads"]
        same = e["numba_same_threads_over_public"]
        goals.append((f"{name}: public call / raw looped kernel (every route ≤ 1.3× its own kernel)",
                      f"≤ {e['goal_public_over_raw']}×", f"{e['public_over_raw']:.2f}×",
                      e["public_over_raw"] <= e["goal_public_over_raw"]))
        goals.append((f"{name}: public call on the looped path ({th} thr., default) vs the Numba loop on {th} thr.",
                      f"≥ {e['goal_numba_over_public']}×", f"{same:.2f}×", same >= e["goal_numba_over_public"]))
        lines += [f"### {label}, N = {e['rows']:,} (looped numeric path)", "",
                  f"Raw looped kernel {ns(e['raw_1thread_ns'])} / {ns(e['raw_2threads_ns'])} per set on 1 / 2 "
                  f"threads; Numba loop ({e['numba_lanes']} sets per block) {ns(e['numba_1thread_ns'])} / "
                  f"{ns(e['numba_2threads_ns'])}; numpy's dense solve timed on {e['numpy_dense_sets']:,} "
                  f"set{'s' if e['numpy_dense_sets'] != 1 else ''}. Flops per set: looped {fmt(e['flops'])}"
                  + (f", `auto` {fmt(e['auto']['flops'])}" if e.get("auto") else "")
                  + f", Numba loop {fmt(e['numba_flops'])}. Best of interleaved rounds.", ""]
        lines += table(["route"] + PUBLIC_COLUMNS, rws)
    return lines


def section_backends(R: Results, goals: list) -> list[str]:
    lines = ["## Back ends (Q3, Q4; rates log-uniform in [1e-3, 1e3])", "",
             "Raw compiled kernel (`m.kernel(X, out, threads=t)`), median ns per parameter set. "
             "Ratios are against the baselines measured in the same run at the same N and thread "
             "count (numpy's batched dense solve is one call; the Numba loop is matched by thread count). "
             "treeflux's `Kernel` splits rows over threads only above 2,048 rows per thread, so its "
             "2-thread rows at N = 1,024 run on one thread. Floors: "
             "*arithmetic* = flops of the compiled Function (`count_ops`) at the nominal peak of one core "
             "(32 double flops per cycle: two 512-bit add and two 512-bit multiply pipes; divisions not "
             "weighted); *memory* = 8·(n_symbols + n_outputs) bytes per set at the copy bandwidth measured "
             "in the run.", ""]
    goal_ns = {"Q3": 30, "Q4": 80}
    goal_np = {"Q3": 100, "Q4": 150}
    bw = R.info("bench_backends.py::test_memory_bandwidth")
    if bw:
        lines += [f"Measured copy bandwidth (256 MiB, warm, read + write): {fmt(bw.get('bandwidth_GBs'))} GB/s "
                  f"(32 MiB: {fmt(bw.get('bandwidth_32MiB_GBs'))} GB/s).", ""]
    for name in ("Q3", "Q4"):
        numpy_ns = R.info(f"bench_backends.py::test_numpy_dense[{name}]").get("ns_per_set")
        sympy_ns = R.info("bench_backends.py::test_sympy_lambdify_q3").get("ns_per_set") if name == "Q3" else None
        for rows, tag in ((200000, "N200000"), (1024, "N1024")):
            rws = []
            best = None
            for backend in ("python", "c", "llvm", "cython"):
                for threads in (1, 2):
                    e = R.info(f"bench_backends.py::test_backend[{name}-{backend}-{threads}-{tag}]")
                    if not e:
                        continue
                    nb = R.info(f"bench_backends.py::test_numba_loop[{name}-{threads}-{tag}]").get("ns_per_set")
                    t = e["ns_per_set"]
                    if best is None or t < best[0]:
                        best = (t, backend, threads, nb)
                    rws.append([backend, threads, ns(t),
                                f"{numpy_ns / t:,.0f}×" if numpy_ns else "—",
                                f"{nb / t:.2f}×" if nb else "—",
                                f"{sympy_ns / t:,.0f}×" if sympy_ns else "—",
                                e.get("flops"), ns(e.get("arith_floor_ns")), f"{e.get('arith_floor_ns', 0) / t:.0%}",
                                e.get("bytes_per_set"), ns(e.get("memory_floor_ns")),
                                f"{e.get('memory_floor_ns', 0) / t:.0%}"])
            for threads in (1, 2):
                e = R.info(f"bench_backends.py::test_numba_loop[{name}-{threads}-{tag}]")
                if e:
                    rws.append([f"*Numba loop* ({e.get('lanes')} sets/block)", threads, ns(e["ns_per_set"]),
                                f"{numpy_ns / e['ns_per_set']:,.0f}×" if numpy_ns else "—", "1×", "—",
                                e.get("flops"), ns(e.get("arith_floor_ns")),
                                f"{e.get('arith_floor_ns', 0) / e['ns_per_set']:.0%}", e.get("bytes_per_set"),
                                ns(e.get("memory_floor_ns")), f"{e.get('memory_floor_ns', 0) / e['ns_per_set']:.0%}"])
            if not rws:
                continue
            lines += [f"### {name}, N = {rows:,}", ""]
            lines += table(["back end", "threads", "per set", "vs numpy", "vs Numba", "vs SymPy", "flops",
                            "arith. floor", "of floor", "bytes", "memory floor", "of floor"], rws)
            if rows == 200000 and best:
                t, backend, threads, nb = best
                goals.append((f"{name}: ns per set, best back end, N = 200,000", f"≤ {goal_ns[name]} ns",
                              f"{t:.1f} ns ({backend}, {threads} thr.)", t <= goal_ns[name]))
                if numpy_ns:
                    goals.append((f"{name}: speed-up over numpy batched solve", f"≥ {goal_np[name]}×",
                                  f"{numpy_ns / t:,.0f}×", numpy_ns / t >= goal_np[name]))
                nb_best = min(x for x in (R.info(f"bench_backends.py::test_numba_loop[{name}-{th}-{tag}]")
                                          .get("ns_per_set") for th in (1, 2)) if x)
                goals.append((f"{name}: speed-up over the Numba loop (best thread count of each)", "≥ 1.5×",
                              f"{nb_best / t:.2f}×", nb_best / t >= 1.5))
        base = [["numpy batched dense solve (assembly incl.)", ns(numpy_ns)]]
        if name == "Q3":
            s = R.info("bench_backends.py::test_sympy_lambdify_q3")
            base.append(["SymPy tree sums + lambdify(cse=True)", ns(s.get("ns_per_set"))])
        else:
            trees = R.info("bench_backends.py::test_sympy_lambdify_q3").get("q4_trees_per_state")
            base.append(["SymPy tree sums", f"does not finish: {fmt(trees)} rooted spanning trees per state"])
        pub = R.info(f"bench_backends.py::test_public_steady_state[{name}]")
        if pub:
            base.append(["treeflux `m.steady_state(X, out=)` (LLVM, validation + guard incl.)", ns(pub["ns_per_set"])])
        lines += [f"Baselines and public call, {name}, N = 200,000:", ""] + table(["route", "per set"], base)
    s = R.info("bench_backends.py::test_sympy_lambdify_q3")
    if s:
        lines += [f"SymPy route on Q3: derive the minors {fmt(s['derive_s'])} s, cse {fmt(s['cse_s'])} s, "
                  f"lambdify {fmt(s['lambdify_s'])} s (total {fmt(s['total_s'])} s); {s['ops_after_cse']:,} "
                  f"operations after cse (`sympy.count_ops`), {s['tree_terms_per_state'][0]} tree terms per state.", ""]
    return lines


def section_numeric(R: Results, goals: list) -> list[str]:
    e = R.info("bench_backends.py::test_numeric_random200")
    if not e:
        return []
    t = e["ns_per_set"]
    goals.append(("random 200 states / 600 edges, `method=\"numeric\"`", "≤ 15 µs", ns(t), t <= 15000))
    rows = [["treeflux `method=\"numeric\"` (`m.steady_state`)", ns(t), "1×"],
            ["Numba loop, 1 thread", ns(e["numba_ns_1thread"]), f"{e['numba_ns_1thread'] / t:.2f}×"],
            ["Numba loop, 2 threads", ns(e["numba_ns_2threads"]), f"{e['numba_ns_2threads'] / t:.2f}×"],
            ["numpy batched dense solve", ns(e["numpy_dense_ns"]), f"{e['numpy_dense_ns'] / t:,.0f}×"]]
    return (["## Looped numeric path: random 200 states, 600 edges", "",
             f"{e['rows']:,} parameter sets; plan flops {fmt(e.get('plan_flops'))}, Numba loop flops "
             f"{fmt(e.get('numba_flops'))} (fill {fmt(e.get('numba_fill'))}).", ""]
            + table(["route", "per set", "time / treeflux"], rows))


def section_jacobian(R: Results, goals: list) -> list[str]:
    rows = []
    for k, b in R.in_file("bench_backends.py"):
        if not k.startswith("bench_backends.py::test_jacobian["):
            continue
        e = b["extra_info"]
        rows.append([e["scheme"], e["backend"], ns(e["value_ns_per_set"]), ns(e["ns_per_set"]),
                     f"{e['ratio_to_value']:.1f}× {met(e['ratio_to_value'] <= 4)}",
                     f"{e['per_state_row_ratio']:.2f}× {met(e['per_state_row_ratio'] <= 4)}",
                     e["value_flops"], e["jac_flops"], e["outputs"], ns(e["jac_memory_floor_ns"]),
                     fmt(e["compile_s"])])
        if e["backend"] == "llvm":
            goals.append((f"{e['scheme']}: Jacobian (all states × all symbols) / value, LLVM", "≤ 4×",
                          f"{e['ratio_to_value']:.1f}×", e["ratio_to_value"] <= 4))
            goals.append((f"{e['scheme']}: Jacobian per state row / value, LLVM", "≤ 4×",
                          f"{e['per_state_row_ratio']:.2f}×", e["per_state_row_ratio"] <= 4))
    if not rows:
        return []
    return (["## Jacobian (`jacobian=True`: value and ∂p_i/∂θ_j for every state and symbol)", "",
             "N = 20,000, one thread, value and Jacobian kernels timed in the same test. The Jacobian "
             "has n·n_symbols outputs, so its memory floor alone is a large multiple of the value time; "
             "the per-row ratio is (Jacobian time / value time) / n. Q4 with C and Cython is left out: "
             "gcc took 218 s and Cython 39 s to build its 19,479-operation body in a trial run.", ""]
            + table(["scheme", "back end", "value", "value + Jacobian", "ratio (goal ≤ 4×)",
                     "per state row (goal ≤ 4×)", "value flops", "Jacobian flops", "outputs",
                     "memory floor", "compile s"], rows))


def section_compile(R: Results, goals: list) -> list[str]:
    rows = []
    sympy_s = R.info("bench_backends.py::test_sympy_lambdify_q3").get("total_s")
    limits = {"llvm": 2.0, "c": 3.0}
    for backend in ("llvm", "c", "python"):
        e = R.info(f"bench_backends.py::test_compile_time_q3[{backend}]")
        if not e:
            continue
        t = e["compile_s"]
        lim = limits.get(backend)
        rows.append([backend, fmt(t), f"< {lim} s" if lim else "—", met(t < lim) if lim else "—",
                     f"{sympy_s / t:,.0f}×" if sympy_s else "—"])
        if lim:
            goals.append((f"Q3 cold compile, {backend}", f"< {lim:g} s", f"{t:.3g} s", t < lim))
    cy = R.info("bench_backends.py::test_backend[Q3-cython-1-N200000]")
    if cy:
        rows.append(["cython (first build in the session)", fmt(cy["compile_s"]), "—", "—",
                     f"{sympy_s / cy['compile_s']:,.1f}×" if sympy_s else "—"])
    if sympy_s:
        rows.append(["SymPy route (derive + cse + lambdify)", fmt(sympy_s), "≈ 12 s (reference)", "—", "1×"])
    if not rows:
        return []
    return (["## Compile time of Q3 (cold cache: a fresh cache directory per round, median of 3)", ""]
            + table(["route", "seconds", "goal", "", "faster than SymPy"], rows))


def section_big_bodies(R: Results) -> list[str]:
    """Cold builds of the big straight-line bodies per back end (bench_compile.py)."""
    cases: dict = {}
    for k, b in R.in_file("bench_compile.py"):
        e = b["extra_info"]
        if "case" in e and "backend" in e:
            cases.setdefault(e["case"], {})[e["backend"]] = e
    if not cases:
        return []
    backends = ("c", "cython", "llvm")
    rows = []
    for case, per in cases.items():
        cells = []
        for be in backends:
            e = per.get(be)
            if e is None:
                cells.append("—")
                continue
            cell = f"{e['seconds']:.2f} s"
            if "compiler_peak_mb" in e:
                cell += f" (compiler peak {e['compiler_peak_mb']:.0f} MB)"
            g = e.get("goal")
            if isinstance(g, dict):
                cell += f", goal {g['target']}: {met(g['met'])}"
            cells.append(cell)
        rows.append([case, *cells])
    lines = ["## Compile time of the big bodies (cold, one build each)", "",
             "Front end, simplification and back end of one `compile_scheme(..., cache=False)`; Q4 with and "
             "without `jacobian=True`, a 400-state birth-death chain. The compiler's peak memory is measured "
             "for the chain's C build in a fresh process (its compiler children only).", ""]
    lines += table(["body", *backends], rows)
    q7 = R.info("bench_compile.py::test_emit_c_of_128_states")
    if q7:
        lines += [f"`treeflux compile --target c` of Q7 (128 states, about 123,000 flops): emit "
                  f"{q7['emit_seconds']:.1f} s, gcc {q7['gcc_seconds']:.1f} s (goal < 60 s together).", ""]
    return lines


def section_large(R: Results, goals: list) -> list[str]:
    lines = ["## Large graphs", ""]
    e = R.info("bench_large.py::test_q4_compile_time")
    rows = []
    if e:
        rows.append(["Q4 (64 edge symbols): cold compile, python back end", f"{e['compile_s']:.3g} s", "< 5 s",
                     met(e["compile_s"] < 5)])
        goals.append(("Q4 compile (front end + simplify + python back end)", "< 5 s", f"{e['compile_s']:.3g} s",
                      e["compile_s"] < 5))
    e = R.info("bench_large.py::test_q4_accuracy_wide_rates")
    if e:
        rows.append([f"Q4: worst entrywise relative error, rates over [1e-12, 1e12] ({e['sets']} sets, "
                     f"smallest p {e['smallest_probability']:.1e})", f"{e['worst_relative_error']:.2e}", "≤ 1e-13",
                     met(e["worst_relative_error"] <= 1e-13)])
        rows.append(["Q4: numpy LU on the same sets", f"{e['numpy_lu_worst_relative_error']:.2e}", "—", "—"])
        goals.append(("Q4 accuracy vs mpmath, rates over [1e-12, 1e12]", "≤ 1e-13",
                      f"{e['worst_relative_error']:.1e}", e["worst_relative_error"] <= 1e-13))
    e = R.info("bench_large.py::test_q6_auto")
    if e:
        rows.append([f"Q6 (384 edge symbols): `auto` chooses", e["method"], "—", e.get("auto_reason") or ""])
        ok = e["compile_llvm_s"] < 60 or e["method"] == "numeric"
        rows.append(["Q6: cold compile, LLVM back end", f"{e['compile_llvm_s']:.3g} s", "< 60 s or numeric", met(ok)])
        rows.append(["Q6: cold compile, python back end", f"{e['compile_python_s']:.3g} s", "< 60 s or numeric",
                     met(e["compile_python_s"] < 60)])
        rows.append(["Q6: steady state per set (LLVM, N = 4,096, `m.steady_state`)", ns(e["ns_per_set"]), "—", "—"])
        rows.append(["Q6: worst relative error vs mpmath, rates in [1e-3, 1e3]", f"{e['worst_relative_error']:.2e}",
                     "≤ 1e-12", met(e["worst_relative_error"] <= 1e-12)])
        goals.append(("Q6 compile (auto, LLVM)", "< 60 s or numeric", f"{e['compile_llvm_s']:.3g} s ({e['method']})", ok))
        goals.append(("Q6 accuracy vs mpmath", "≤ 1e-12", f"{e['worst_relative_error']:.1e}",
                      e["worst_relative_error"] <= 1e-12))
    lines += table(["figure", "measured", "goal", "met / note"], rows)
    drows = []
    for name in ("Q3", "Q4", "Q6"):
        e = R.info(f"bench_large.py::test_digits_on_stiff_rates[{name}]")
        for spread, d in (e.get("digits") or {}).items():
            drows.append([name, spread, f"{d['treeflux']:.1f}", f"{d['numba_loop']:.1f}", f"{d['numpy_lu']:.1f}",
                          f"{d['smallest_probability']:.1e}", d["reference_dps"]])
    if drows:
        lines += ["### Digits kept on stiff rates", "",
                  "−log10 of the worst entrywise relative error against mpmath's LU solve (50 digits, confirmed "
                  "at 90; raised until two precisions agree to 1e-20), over 6 parameter sets per spread "
                  "(3 for Q6); rates log-uniform over [10^-s, 10^s]. treeflux: `auto` method, LLVM back end.", ""]
        lines += table(["scheme", "rate spread", "treeflux", "Numba loop (GTH)", "numpy LU", "smallest p",
                        "reference digits"], drows)
    return lines


def section_others(R: Results) -> list[str]:
    files = sorted({k.split("::")[0] for k in R.by_name} - {"bench_backends.py", "bench_large.py",
                                                            "bench_public.py"})
    lines = ["## Other benches in this directory", "",
             "Figures recorded by " + ", ".join(f"`{f}`" for f in files) + " (their own goals and "
             "baselines; see each file's docstring). Time is the pytest-benchmark median of the timed call.", ""]
    for fname in files:
        items = R.in_file(fname)
        if not items:
            continue
        rows = []
        for k, b in items:
            e = b["extra_info"]
            flat = []
            for key, val in e.items():
                if isinstance(val, dict):
                    if all(isinstance(v, (int, float)) for v in val.values()) and len(val) <= 6:
                        flat.append(f"{key}: " + ", ".join(f"{kk} {fmt(vv)}" for kk, vv in val.items()))
                    continue
                if isinstance(val, (int, float, str, bool)):
                    flat.append(f"{key} {fmt(val)}")
            rows.append([k.split("::", 1)[1], f"{fmt(b['stats']['median'] * 1e3)} ms", "; ".join(flat) or "—"])
        lines += [f"### {fname}", ""] + table(["benchmark", "median", "recorded figures"], rows)
    return lines


def others_goals(R: Results, goals: list) -> None:
    """Goals the other bench files record as figures (their own definitions)."""
    for k, b in R.in_file("bench_numeric.py"):
        e = b["extra_info"]
        if "goal_ns_per_set" in e and "ns_per_set" in e:
            goals.append((f"bench_numeric {k.split('::')[1]}: looped elimination per set",
                          f"≤ {ns(e['goal_ns_per_set'])}", ns(e["ns_per_set"]), e["ns_per_set"] <= e["goal_ns_per_set"]))
        if "goal_speedup_vs_numba" in e and "goal" not in e:
            g, g2 = e["goal_speedup_vs_numba"], e["goal_second_thread_speedup"]
            for key, word in (("speedup_vs_numba_1thread", "1 thread"), ("speedup_vs_numba_2threads", "2 threads")):
                r = e[key]
                goals.append((f"bench_numeric {e['scheme']}: raw looped kernel vs the Numba loop, both on {word}",
                              f"≥ {g}×", f"{r:.2f}×", r >= g))
            r = e["second_thread_speedup"]
            goals.append((f"bench_numeric {e['scheme']}: raw looped kernel, 2 threads / 1 thread", f"≥ {g2}×",
                          f"{r:.2f}×", r >= g2))
    for k, b in R.in_file("bench_simplify.py"):
        e = b["extra_info"]
        if "gradient_time_ratio" in e:
            goals.append((f"bench_simplify {k.split('::')[1]}: gradient of one observable / value (numpy eval.)",
                          "≤ 4×", f"{e['gradient_time_ratio']:.2f}× (ops {e['gradient_op_ratio']:.2f}×)",
                          e["gradient_time_ratio"] <= 4))
        if "op_ratio" in e:
            goals.append(("bench_simplify Q3 tree form: ops after simplify / after sympy.cse", "≤ 1/3",
                          f"{e['op_ratio']:.2f}", e["op_ratio"] <= 1 / 3))
    for k, b in R.by_name.items():
        e = b["extra_info"]
        g = e.get("goal")
        if isinstance(g, dict) and {"label", "target", "measured", "met"} <= set(g):
            goals.append((g["label"], g["target"], g["measured"], bool(g["met"])))
        elif "goal_ms" in e and "fit_ms" in e:
            goals.append((f"enzyme example fit after compile, {e.get('backend')} back end "
                          f"(kernel calls {100 * e.get('fraction_in_kernel', float('nan')):.0f}% of it)",
                          f"< {e['goal_ms']:g} ms", f"{e['fit_ms']:.1f} ms", e["fit_ms"] <= e["goal_ms"]))


def write_readme(data: dict, run: dict, mach: dict, path: Path) -> list:
    R = Results(data)
    goals: list = []
    lead = section_public(R, goals) + section_big_bodies(R)
    body = []
    body += section_backends(R, goals)
    body += section_numeric(R, goals)
    body += section_jacobian(R, goals)
    body += section_compile(R, goals)
    body += section_large(R, goals)
    body += section_others(R)
    others_goals(R, goals)
    head = ["# Benchmarks", "",
            "Generated by `python benches/report.py` (do not edit by hand): it runs "
            f"`{run.get('command', 'python -m pytest benches --benchmark-only')}` and writes this page. "
            "All ratios come from one run on one machine; timings are medians. The machine is shared "
            "with other work, so single figures can move by tens of percent between runs.", "",
            "## Machine", ""]
    mrows = [["CPU", mach["cpu"]], ["SIMD", mach["simd"]], ["cores", str(mach["cores"])],
             ["memory", f"{mach['memory_gib']} GiB"], ["Python", mach["python"]],
             ["numpy / scipy / sympy", f"{mach['numpy']} / {mach['scipy']} / {mach['sympy']}"],
             ["llvmlite (LLVM)", f"{mach['llvmlite']} ({mach['llvm']})"], ["numba", mach["numba"]],
             ["Cython", mach["cython"]], ["gcc", mach["gcc"]], ["pytest-benchmark", mach["pytest_benchmark"]],
             ["date", mach["date"]]]
    if run.get("load_before"):
        mrows.append(["load average (1, 5, 15 min) before / after the run",
                      " / ".join(", ".join(f"{x:.2f}" for x in run[k]) for k in ("load_before", "load_after"))])
    if run.get("wall_s"):
        mrows.append(["suite wall time", f"{run['wall_s'] / 60:.1f} min (exit status {run['exit_status']})"])
    head += table(["", ""], mrows)
    if run.get("summary"):
        head += ["pytest: " + "; ".join(run["summary"]), ""]
    summary = ["## Goals", ""] + table(["goal", "target", "measured", ""],
                                       [[g, t, m, met(ok)] for g, t, m, ok in goals])
    path.write_text("\n".join(head + lead + summary + body).rstrip() + "\n")
    return goals


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--from-json", type=Path, help="write the README from a saved benchmark JSON")
    ap.add_argument("--output", type=Path, default=HERE / "README.md")
    ap.add_argument("--save-json", type=Path, help="also keep the raw benchmark JSON here")
    args = ap.parse_args(argv)
    mach = machine()
    if args.from_json:
        data = json.loads(args.from_json.read_text())
        run = data.get("treeflux_run", {})
    else:
        with tempfile.TemporaryDirectory() as tmp:
            jpath = Path(tmp) / "bench.json"
            run = run_suite(jpath)
            if not jpath.exists():
                print("the benchmark run wrote no JSON; see the output above", file=sys.stderr)
                return 1
            data = json.loads(jpath.read_text())
        data["treeflux_run"] = run
        if args.save_json:
            args.save_json.write_text(json.dumps(data))
    goals = write_readme(data, run, mach, args.output)
    met_count = sum(1 for g in goals if g[3])
    print(f"wrote {args.output}: {met_count} of {len(goals)} goals met")
    return 0 if not run.get("exit_status") else 1


if __name__ == "__main__":
    sys.exit(main())
