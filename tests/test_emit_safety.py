"""Names never run as code, in any back end (issue 10, item 1; issue 8, item 6).

Every name that reaches generated code -- the model name, ``compile_scheme(name=)``,
state, symbol and observable names -- is a payload here that would create a
canary file if it were ever executed as Python or C, or that would break out
of a string literal, a comment or a line (quotes, triple quotes, newlines,
backslashes, ``*/``, ``#``, ``??=`` trigraphs, NUL, non-ASCII). The canary must
never appear; the names must read back exactly from the emitted code (a fresh
interpreter for Python, the real C compiler for C); C refuses NUL with one line.

Also: straight-line code of a 5,000-state chain never hits Python's recursion
limit, and emitted code returns an error status (never NaN with status 0) for
zero, negative and non-finite rates.
"""

from __future__ import annotations

import json
import shutil
import unicodedata
import subprocess
import sys

import numpy as np
import pytest

from treeflux.compiler import Scheme, compile_scheme
from treeflux.compiler.backends import naming
from treeflux.compiler.errors import ModelError
from treeflux.compiler.pipeline import emit

CC = shutil.which("gcc") or shutil.which("cc")
STRICT = ["-std=c99", "-Wall", "-Wextra", "-pedantic", "-Werror"]


def payloads(canary) -> list[str]:
    """Names that would touch ``canary`` if any back end executed them."""
    py = f"__import__('pathlib').Path({str(canary)!r}).touch()"
    c = f'system("touch {canary}")'
    return [
        f'x"""\n{py}\n"""',
        f"x'''\n{py}\n'''",
        f'A"; {c}; char *y = "',
        f"B*/ int main(void) {{ {c}; return 0; }} /*",
        f"C\\\n{py}",
        f"D\n#include <stdlib.h>\n{py} # */",
        "E??=??/??' tri",
        "Ca²⁺·Mg\u00e9\u2028\u0085 \U0001F600",
        "F\r\t\x0b\x0c\x1b[31m",
    ]


def loadable(name: str) -> str:
    """The part of a payload that a scheme accepts as a name: the loader refuses
    control characters, invisible ones and anything NFKC would change (so that
    messages stay one line and look-alikes cannot hide), leading/trailing blanks."""
    return "".join(ch for ch in name if ch.isprintable() and unicodedata.normalize("NFKC", ch) == ch).strip()


def payload_scheme(canary) -> Scheme:
    """A three-state scheme whose model, state and observable names are payloads
    (symbol names must be identifiers of the rate language, non-ASCII included)."""
    names = [loadable(x) for x in payloads(canary)]
    s = Scheme(name=names[0])
    a, b, c = names[1], names[2], names[7]
    s.add_parameter("k1", value=2.0)
    s.add_parameter("kΔ", value=0.5)
    s.add_edge(a, b, "k1")
    s.add_edge(b, a, "kΔ")
    s.add_edge(b, c, "3*k1")
    s.add_edge(c, a, "kΔ")
    s.add_observable(names[3], {a: 1.0, c: 2.0})
    s.add_observable(names[5], {b: 1.0})
    s.add_observable(names[6] + names[8], {c: 1.0})
    return s


def reference(s: Scheme) -> np.ndarray:
    return compile_scheme(s, backend="python", cache=False).steady_state(s.defaults())[0]


@pytest.mark.parametrize("backend", ["python", "c", "cython", "llvm"])
def test_compile_name_never_runs(tmp_path, backend):
    canary = tmp_path / "canary"
    s = payload_scheme(canary)
    names = payloads(canary)
    chosen = names if backend == "python" else names[:1]  # native builds cost seconds each
    want = reference(s)
    for name in chosen:
        m = compile_scheme(s, backend=backend, name=name, cache=False)
        np.testing.assert_allclose(m.steady_state(s.defaults())[0], want, rtol=1e-14)
        assert not canary.exists()
    for bad in (None, 3, b"x"):
        with pytest.raises(ModelError, match="name must be a string"):
            compile_scheme(s, backend="python", name=bad)


def test_stem_is_a_safe_identifier():
    assert [naming.stem(t) for t in ("main", "setup", "numpy", "json", "Enzyme 2")] == \
        ["main_model", "setup_model", "numpy_model", "json_model", "enzyme_2"]
    for text in ["../../etc/passwd", 'x"""\n', "é", "", "import", "3abc", "a" * 200, "\x00"]:
        st = naming.stem(text)
        assert st.isidentifier() and st.isascii() and len(st) <= naming.MAX_STEM + 8
        assert "/" not in st and "." not in st


def test_c_string_reads_back(tmp_path):
    """Every byte value survives a C literal (checked by the C compiler itself)."""
    text = "".join(chr(i) for i in range(1, 256)) + "??=??/ é \U0001F600 */ \"x\" \\"
    lit = naming.c_string(text)
    assert lit.isascii() and "\n" not in lit and "??" not in lit  # "*/" is inert in a literal
    src = tmp_path / "t.c"
    src.write_text('#include <stdio.h>\nint main(void) { static const char s[] = '
                   f'{lit}; fwrite(s, 1, sizeof s - 1, stdout); return 0; }}\n')
    subprocess.run([CC, *STRICT, "-trigraphs", "-o", str(tmp_path / "t"), str(src)], check=True)
    out = subprocess.run([str(tmp_path / "t")], capture_output=True, check=True).stdout
    assert out == text.encode()


def test_emit_python_names_read_back(tmp_path):
    canary = tmp_path / "canary"
    s = payload_scheme(canary)
    paths = emit(s, "python", tmp_path / "out")
    assert not canary.exists()
    (mod,) = [p for p in paths if p.suffix == ".py"]
    assert mod.read_text().isascii()
    code = ("import json, sys; sys.path.insert(0, sys.argv[1]); m = __import__(sys.argv[2]); "
            "print(json.dumps([m.MODEL, m.STATES, m.SYMBOLS, m.OBSERVABLES, m.DEFAULTS, "
            "m.steady_state(m.inputs()).tolist()]))")
    res = subprocess.run([sys.executable, "-c", code, str(mod.parent), mod.stem],
                         capture_output=True, text=True, check=True, cwd=tmp_path)
    model, states, symbols, observables, defaults, p = json.loads(res.stdout)
    assert not canary.exists()
    assert model == s.name and states == list(s.states) and symbols == list(s.symbols)
    assert observables == list(s.observables) and defaults == s.defaults()
    np.testing.assert_allclose(p[0], reference(s), rtol=1e-14)
    layout = json.loads((mod.parent / f"{mod.stem}.layout.json").read_text())
    assert layout["scheme"] == s.name and layout["outputs"]["p"] == list(s.states)


@pytest.mark.skipif(CC is None, reason="needs a C compiler")
def test_emit_c_names_read_back(tmp_path):
    canary = tmp_path / "canary"
    s = payload_scheme(canary)
    paths = emit(s, "c", tmp_path / "out")
    out = paths[0].parent
    stem = naming.stem(s.name)
    for p in paths:
        if p.suffix in (".c", ".h"):
            assert p.read_text().isascii()
    # A program that prints every name array as raw bytes, NUL-separated.
    (out / "names.c").write_text(f"""\
#include <stdio.h>
#include <string.h>
#include "{stem}.h"
static void show(const char *const *a, int n) {{
    int k;
    for (k = 0; k < n; k++) fwrite(a[k], 1, strlen(a[k]) + 1, stdout);
    fputc('\\n', stdout);
}}
int main(void) {{
    fwrite({stem}_model_name, 1, strlen({stem}_model_name) + 1, stdout);
    fputc('\\n', stdout);
    show({stem}_state_names, {stem.upper()}_N_STATES);
    show({stem}_symbol_names, {stem.upper()}_N_SYMBOLS);
    show({stem}_observable_names, {stem.upper()}_N_OBSERVABLES);
    return 0;
}}
""")
    for prog, srcs in (("names", ["names.c"]), ("example", ["main.c"])):
        subprocess.run([CC, *STRICT, "-trigraphs", "-O1", "-o", prog, *srcs, f"{stem}.c", "-lm"],
                       cwd=out, check=True, capture_output=True)
    raw = subprocess.run([str(out / "names")], capture_output=True, check=True).stdout
    parts = raw.split(b"\0\n")
    decode = [[x.decode() for x in part.split(b"\0") if x or part] for part in parts]
    assert raw.startswith(s.name.encode() + b"\0\n")
    assert decode[1][:len(s.states)] == list(s.states)
    assert decode[2][:len(s.symbols)] == list(s.symbols)
    assert decode[3][:len(s.observables)] == list(s.observables)
    res = subprocess.run([str(out / "example")], capture_output=True, check=True)
    assert not canary.exists()
    values = [float(line.split(b"\t")[0]) for line in res.stdout.split(b"\n")
              if line[:1].isdigit()]
    np.testing.assert_allclose(values[:3], reference(s), rtol=1e-14)
    # A NUL or a newline never gets as far as code generation: refused at load, one line.
    for bad in ("E\x00S", "E\nS"):
        with pytest.raises(ModelError, match="control character") as info:
            Scheme(name=bad)
        assert "\n" not in str(info.value)


def test_emit_llvm_carries_no_names(tmp_path):
    canary = tmp_path / "canary"
    s = payload_scheme(canary)
    paths = emit(s, "llvm", tmp_path / "ll")
    (ll,) = [p for p in paths if p.suffix == ".ll"]
    text = ll.read_text()
    assert text.isascii() and "touch" not in text and "k1" not in text
    layout = json.loads(ll.with_name(ll.stem + ".layout.json").read_text())
    assert layout["outputs"]["p"] == list(s.states) and layout["scheme"] == s.name
    assert not canary.exists()


STATUSES = """\
def statuses(m):
    import numpy as np
    good = [m.DEFAULTS[k] for k in m.SYMBOLS]
    res = []
    for bad in (good, [0.0, good[1]], [good[0], -1.0], [float("inf"), good[1]]):
        X = np.array([good, bad, good])
        res.append(int(m.run(X, np.zeros((3, m.N_OUTPUTS)), 0, 3)))
    return res
"""


def test_emit_cython_builds_and_reads_back(tmp_path):
    """The emitted .pyx with payload names (NUL included), built by its own
    setup.py in a child process and imported in a fresh interpreter: names
    read back exactly, values equal the API, the canary never appears.
    (The one Cython build of the suite.)"""
    canary = tmp_path / "canary"
    s = payload_scheme(canary)
    out = tmp_path / "cy"
    paths = emit(s, "cython", out)
    assert {p.name for p in paths} >= {"setup.py", f"{naming.stem(s.name)}.pyx"}
    assert all(p.read_text().isascii() for p in paths)
    subprocess.run([sys.executable, "setup.py", "build_ext", "--inplace"], cwd=out, check=True,
                   capture_output=True)
    code = ("import json, sys; sys.path.insert(0, sys.argv[1]); m = __import__(sys.argv[2])\n"
            "print(json.dumps([m.MODEL, m.STATES, m.SYMBOLS, m.OBSERVABLES, m.DEFAULTS, "
            "m.steady_state([m.DEFAULTS[k] for k in m.SYMBOLS]).tolist(), "
            "m.observables([m.DEFAULTS[k] for k in m.SYMBOLS]).tolist(), statuses(m)]))")
    code = STATUSES + code
    res = subprocess.run([sys.executable, "-c", code, str(out), naming.stem(s.name)],
                         capture_output=True, text=True, check=True, cwd=tmp_path)
    model, states, symbols, observables, defaults, p, obs, status = json.loads(res.stdout)
    assert not canary.exists()
    assert model == s.name and states == list(s.states) and symbols == list(s.symbols)
    assert observables == list(s.observables) and defaults == s.defaults()
    # a zero, a negative and a non-finite rate: the row is refused, never NaN with 0
    assert status == [0, 2, 2, 2]
    api = compile_scheme(s, backend="python", cache=False)
    np.testing.assert_allclose(p[0], api.steady_state(s.defaults())[0], rtol=1e-14)
    np.testing.assert_allclose(obs[0], api.observables(s.defaults())[0], rtol=1e-14)


# ------------------------------------------------------------------ deep straight-line code

def test_python_backend_handles_5000_state_chain():
    """A 5,000-state chain (one sum of 5,000 terms in its normalisation) loads
    without Python's recursion limit; p_i ∝ (a/b)^i (detailed balance along a
    chain, common practice)."""
    n = 5000
    s = Scheme(name="long chain")
    for i in range(n - 1):
        s.add_edge(f"s{i}", f"s{i + 1}", "a")
        s.add_edge(f"s{i + 1}", f"s{i}", "b")
    for method in ("equilibrium", "elimination"):
        m = compile_scheme(s, backend="python", method=method, cache=False)
        p = m.steady_state({"a": 1.0, "b": 1.01})[0]
        r = 1 / 1.01
        want = r ** np.arange(n) * (1 - r) / (1 - r ** n)
        np.testing.assert_allclose(p, want, rtol=1e-12)


def test_long_sums_split_with_left_to_right_rounding():
    """A sum of many operands emitted in pieces gives the bits of the one
    left-to-right fold (the reference evaluator's order)."""
    from treeflux.compiler import ir
    from treeflux.compiler.backends import python as pyback

    g = ir.Graph()
    xs = [g.input(j) for j in range(100)]
    fn = ir.Function(g, 100, [])
    fn.add_group("p", [g.add(*xs), g.mul(*xs[:70])])
    fn = ir.compact(fn)
    kern = pyback.build(fn)
    X = np.random.default_rng(5).uniform(0.5, 1.5, (7, 100))
    got = kern(X)
    total = np.zeros(7)
    for j in range(100):
        total = total + X[:, j]
    prod = X[:, 0].copy()
    for j in range(1, 70):
        prod = prod * X[:, j]
    assert np.array_equal(got[:, 0], total) and np.array_equal(got[:, 1], prod)
    (src,) = pyback.emit(fn).values()
    assert max(line.count(" + ") for line in src.splitlines()) < 40
    if CC is not None:  # the C back end splits the same way (a local accumulator)
        from treeflux.compiler.backends import c as cback
        ctext = cback.emit(fn, name="longsum")["longsum.c"]
        assert max(line.count(" + ") for line in ctext.splitlines()) < 40
        assert np.array_equal(cback.build(fn, name="longsum")(X), got)


# ------------------------------------------------------------------ error status

def three_state_binding() -> Scheme:
    s = Scheme(name="binding")
    s.add_parameter("kon", value=2.0)
    s.add_parameter("koff", value=3.0)
    s.add_input("L", value=0.5)
    s.add_edge("E", "EL", "kon*L")
    s.add_edge("EL", "E", "koff")
    s.add_edge("EL", "EL2", "kon*L")
    s.add_edge("EL2", "EL", "2*koff")
    return s


BAD_ROWS = [[2.0, 3.0, 0.0],          # zero concentration: two edges vanish
            [2.0, -3.0, 0.5],         # negative rate
            [2.0, 3.0, np.inf],       # non-finite input
            [1e300, 3.0, 1e300]]      # a rate that overflows to inf


def test_emitted_python_status(tmp_path):
    s = three_state_binding()
    (mod,) = [p for p in emit(s, "python", tmp_path) if p.suffix == ".py"]
    ns: dict = {}
    exec(compile(mod.read_text(), str(mod), "exec"), ns)
    good = [2.0, 3.0, 0.5]
    want = reference(s)
    for bad in BAD_ROWS:
        X = np.array([good, bad, good])
        out = np.full((3, ns["N_OUTPUTS"]), -7.0)
        assert ns["run"](X, out, 0, 3) == 2, bad
        np.testing.assert_allclose(out[0, :3], want, rtol=1e-14)
        assert np.all(out[1:] == -7.0)  # the refused row and those after it are untouched
        with pytest.raises(ValueError, match="row 1 refused"):
            ns["evaluate"](X)
    assert ns["run"](np.array([good]), np.empty((1, ns["N_OUTPUTS"])), 0, 1) == 0


@pytest.mark.skipif(CC is None, reason="needs a C compiler")
def test_emitted_c_status(tmp_path):
    s = three_state_binding()
    emit(s, "c", tmp_path)
    subprocess.run([CC, *STRICT, "-O2", "-o", "example", "main.c", "binding.c", "-lm"],
                   cwd=tmp_path, check=True, capture_output=True)
    ok = subprocess.run([str(tmp_path / "example")], capture_output=True, text=True, check=True)
    values = [float(line.split("\t")[0]) for line in ok.stdout.splitlines()]
    np.testing.assert_allclose(values[:3], reference(s), rtol=1e-14)
    for bad in BAD_ROWS:
        res = subprocess.run([str(tmp_path / "example"), *map(repr, bad)], capture_output=True,
                             text=True)
        assert res.returncode == 1 and "row 0 refused" in res.stderr, bad
        assert "nan" not in res.stdout.lower()
