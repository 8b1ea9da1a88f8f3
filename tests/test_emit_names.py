"""Emitted code carries its names (issue 9, item 8).

The C header declares the name arrays, collision-free index constants, the
model's default values and evaluates the observables; ``main.c`` uses the
model's values; the Python module exposes STATES, SYMBOLS, DEFAULTS and
``observables``. Checked by compiling the C with ``-std=c99 -Wall -Wextra
-pedantic -Werror`` and running it, and by importing the Python module in a
fresh interpreter, against the Python API (to 1e-14) on the example models.
The Cython build recipe is run once, in tests/test_emit_safety.py.
"""

from __future__ import annotations

import json
import shutil
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

from treeflux.compiler import Scheme, compile_scheme, load
from treeflux.compiler.backends import naming
from treeflux.compiler.pipeline import emit

EXAMPLES = Path(__file__).resolve().parents[1] / "examples"
CC = shutil.which("gcc") or shutil.which("cc")
STRICT = ["-std=c99", "-Wall", "-Wextra", "-pedantic", "-Werror", "-O1"]


def api_values(s: Scheme) -> tuple[np.ndarray, np.ndarray]:
    m = compile_scheme(s, backend="python", cache=False)
    d = s.defaults()
    obs = m.observables(d)[0] if s.observables else np.zeros(0)
    return m.steady_state(d)[0], obs


@pytest.mark.skipif(CC is None, reason="needs a C compiler")
@pytest.mark.parametrize("example", ["ligand_gated_channel", "enzyme_competitive_inhibitor"])
def test_c_main_prints_steady_state_at_model_values(tmp_path, example):
    s = load(EXAMPLES / f"{example}.toml")
    emit(s, "c", tmp_path)
    st = naming.stem(s.name)
    subprocess.run([CC, *STRICT, "-o", "example", "main.c", f"{st}.c", "-lm"], cwd=tmp_path,
                   check=True, capture_output=True)
    res = subprocess.run([str(tmp_path / "example")], capture_output=True, text=True, check=True)
    rows = [line.split("\t") for line in res.stdout.splitlines()]
    labels = [r[1] for r in rows]
    values = np.array([float(r[0]) for r in rows])
    p, obs = api_values(s)
    assert labels == [*s.states, *s.observables]
    np.testing.assert_allclose(values[:len(p)], p, rtol=1e-14, atol=0)
    np.testing.assert_allclose(values[len(p):], obs, rtol=1e-14, atol=0)
    header = (tmp_path / f"{st}.h").read_text()
    up = st.upper()
    assert f"#define {up}_N_STATES {len(s.states)}" in header
    assert f"#define {up}_OBS_OFFSET {len(s.states)}" in header
    for j, sym in enumerate(s.symbols):
        assert f"#define {up}_SYMBOL_{sym} {j}\n" in header


@pytest.mark.skipif(CC is None, reason="needs a C compiler")
def test_c_index_constants_are_collision_free(tmp_path):
    s = Scheme(name="look alike")
    names = ["A-B", "A_B", "A.B", "A B", "é", "ü", "3x", "OFFSET"]
    s.add_parameter("k", value=1.5)
    s.add_parameter("j", value=0.25)
    for a, b in zip(names, names[1:] + names[:1]):
        s.add_edge(a, b, "k")
        s.add_edge(b, a, "j")
    s.add_observable("OFFSET", {"A-B": 1.0})
    s.add_observable("offset", {"A_B": 1.0})
    emit(s, "c", tmp_path)
    header = (tmp_path / "look_alike.h").read_text()
    defines = [line.split()[1] for line in header.splitlines() if line.startswith("#define")]
    assert len(defines) == len(set(defines))
    # every index constant names its own entry: the C compiler checks it
    consts = [d for d in defines if d.startswith("LOOK_ALIKE_STATE_")]
    assert len(consts) == len(names)
    checks = "\n".join(f'    if (strcmp(look_alike_state_names[{c}], {naming.c_string(n)}) != 0) return 1;'
                       for c, n in zip(consts, s.states))
    # an observable named OFFSET does not take the name of the OBS_OFFSET layout macro
    assert "LOOK_ALIKE_OBS_OFFSET 8" in header and "LOOK_ALIKE_OBS_OFFSET_2 0" in header
    assert "LOOK_ALIKE_STATE_u00E9 4" in header
    checks += ('\n    if (strcmp(look_alike_observable_names[LOOK_ALIKE_OBS_OFFSET_2], "OFFSET")'
               ' != 0) return 1;')
    (tmp_path / "t.c").write_text(f'#include <string.h>\n#include "look_alike.h"\n'
                                  f"int main(void) {{\n{checks}\n    return 0;\n}}\n")
    subprocess.run([CC, *STRICT, "-o", "t", "t.c", "look_alike.c", "-lm"], cwd=tmp_path,
                   check=True, capture_output=True)
    assert subprocess.run([str(tmp_path / "t")]).returncode == 0


def no_default_scheme() -> Scheme:
    """X <-> Y with rates a (value 2) and b (no value in the model)."""
    s = Scheme(name="nodefault")
    s.add_parameter("a", value=2.0)
    s.add_parameter("b")
    s.add_edge("X", "Y", "a")
    s.add_edge("Y", "X", "b")
    return s


@pytest.mark.skipif(CC is None, reason="needs a C compiler")
def test_c_main_refuses_missing_default(tmp_path):
    s = no_default_scheme()
    emit(s, "c", tmp_path)
    subprocess.run([CC, *STRICT, "-o", "ex", "main.c", "nodefault.c", "-lm"], cwd=tmp_path,
                   check=True, capture_output=True)
    res = subprocess.run([str(tmp_path / "ex")], capture_output=True, text=True)
    assert res.returncode == 2 and "symbol b has no default value" in res.stderr
    res = subprocess.run([str(tmp_path / "ex"), "2", "6"], capture_output=True, text=True, check=True)
    # two states: p(X) = b/(a+b) = 0.75 exactly (two-state balance, common practice)
    assert [float(x.split("\t")[0]) for x in res.stdout.splitlines()] == [0.75, 0.25]


@pytest.mark.parametrize("example", ["promoter_two_activators", "proofreading_two_step"])
def test_python_module_in_fresh_interpreter(tmp_path, example):
    s = load(EXAMPLES / f"{example}.toml")
    emit(s, "python", tmp_path)
    st = naming.stem(s.name)
    code = ("import json, sys; sys.path.insert(0, sys.argv[1]); m = __import__(sys.argv[2]); "
            "X = m.inputs(); print(json.dumps({'states': m.STATES, 'symbols': m.SYMBOLS, "
            "'defaults': m.DEFAULTS, 'observables': m.OBSERVABLES, 'outputs': m.OUTPUTS, "
            "'p': m.steady_state(X).tolist(), 'obs': m.observables(X).tolist(), "
            "'half': m.steady_state(m.inputs({m.SYMBOLS[0]: 0.5 * m.DEFAULTS[m.SYMBOLS[0]]})).tolist()}))")
    res = subprocess.run([sys.executable, "-c", code, str(tmp_path), st], capture_output=True,
                         text=True, check=True, cwd=tmp_path)
    got = json.loads(res.stdout)
    assert got["states"] == list(s.states) and got["symbols"] == list(s.symbols)
    assert got["observables"] == list(s.observables)
    assert got["outputs"] == [*s.states, *s.observables]
    assert got["defaults"] == s.defaults()
    p, obs = api_values(s)
    np.testing.assert_allclose(got["p"][0], p, rtol=1e-14, atol=0)
    np.testing.assert_allclose(got["obs"][0], obs, rtol=1e-14, atol=0)
    m = compile_scheme(s, backend="python", cache=False)
    d = dict(s.defaults())
    first = s.symbols[0]
    d[first] *= 0.5
    np.testing.assert_allclose(got["half"][0], m.steady_state(d)[0], rtol=1e-14, atol=0)


def test_python_inputs_refuses_missing_default(tmp_path):
    s = no_default_scheme()
    (mod,) = [p for p in emit(s, "python", tmp_path) if p.suffix == ".py"]
    ns: dict = {}
    exec(compile(mod.read_text(), str(mod), "exec"), ns)
    assert ns["DEFAULTS"] == {"a": 2.0}
    with pytest.raises(KeyError, match="'b' has no default"):
        ns["inputs"]()
    assert ns["steady_state"](ns["inputs"]({"b": 6.0})).tolist() == [[0.75, 0.25]]


def test_several_terminal_components_name_each_basis_column(tmp_path):
    s = Scheme(name="two sinks")
    s.add_edge("A", "B", "k1")
    s.add_edge("A", "C", "k2")
    (mod,) = [p for p in emit(s, "python", tmp_path) if p.suffix == ".py"]
    ns: dict = {}
    exec(compile(mod.read_text(), str(mod), "exec"), ns)
    assert ns["OUTPUTS"] == tuple(f"{c}:{st}" for c in range(2) for st in s.states)
    assert "basis" in ns["GROUPS"] and ns["OBSERVABLES"] == ()
    out = ns["evaluate"]([1.0, 3.0])[0]
    # each terminal component is a single absorbing state: basis vectors e_B and e_C
    assert sorted(out.reshape(2, 3).tolist()) == [[0, 0, 1], [0, 1, 0]]


@pytest.mark.parametrize("target", ["python", "c", "cython", "llvm"])
def test_emit_bytes_are_deterministic(tmp_path, target):
    s = load(EXAMPLES / "ligand_gated_channel.toml")
    first = {p.name: p.read_bytes() for p in emit(s, target, tmp_path / "a")}
    second = {p.name: p.read_bytes() for p in emit(s, target, tmp_path / "b")}
    assert first == second and len(first) >= 2
