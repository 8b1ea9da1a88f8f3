"""Bad model files and bad API inputs: each is refused with one clear line.

Model files (API and CLI): bounded constant folding, constant rates that are
not positive, byte-order marks and non-UTF-8 files, names that would break a
message line, look-alike Unicode, flat sums of many terms. API inputs:
complex, masked, object, string and boolean inputs, ``out=`` of the wrong
kind, bad ``threads``.
"""

from __future__ import annotations

import ast
import contextlib
import signal
import subprocess
import sys
from fractions import Fraction

import numpy as np
import pytest

from treeflux.compiler.errors import ModelError
from treeflux.compiler.ir import Graph, evaluate, lower_label
from treeflux.compiler.model import Scheme
from treeflux.compiler.parse import MAX_DEPTH, MAX_LABEL_LENGTH, load, parse_label
from treeflux.compiler.pipeline import compile_scheme
from treeflux.compiler.cli import main
from treeflux.runtime.errors import EvaluationError


@contextlib.contextmanager
def hang_guard(seconds: float = 10.0):
    """Fail (instead of hanging the suite) if the block runs longer than
    ``seconds``; a hang detector, not a speed check."""
    def expire(*_):
        raise TimeoutError(f"still running after {seconds} s: a hang")
    old = signal.signal(signal.SIGALRM, expire)
    signal.setitimer(signal.ITIMER_REAL, seconds)
    try:
        yield
    finally:
        signal.setitimer(signal.ITIMER_REAL, 0)
        signal.signal(signal.SIGALRM, old)


def assert_one_line(message: str) -> None:
    """One line, every character printable (no newline, escape code or bidi control)."""
    assert message and message.isprintable(), repr(message)
    assert "np.float64" not in message and "Traceback" not in message


def model_text(rate='k1', *, name='"demo"', source='"Apo"', target='"Holo"', extra=""):
    return (f"name = {name}\n{extra}\n"
            f"[[edges]]\nsource = {source}\ntarget = {target}\nrate = {rate}\n\n"
            '[[edges]]\nsource = "Holo"\ntarget = "Apo"\nrate = "1"\n')


def write(tmp_path, text, fname="bad.toml"):
    path = tmp_path / fname
    path.write_bytes(text if isinstance(text, bytes) else text.encode("utf-8"))
    return path


def refused(path, *fragments) -> str:
    with hang_guard(), pytest.raises(ModelError) as info:
        load(path)
    msg = str(info.value)
    assert_one_line(msg)
    assert msg.startswith(str(path)), msg
    for frag in fragments:
        assert frag in msg, (frag, msg)
    return msg


def cli_profile(path) -> subprocess.CompletedProcess:
    return subprocess.run([sys.executable, "-m", "treeflux.compiler.cli", "profile", str(path)],
                          capture_output=True, text=True, timeout=120)


# ------------------------------------------------------------ constant folding (issue 10.2)

BOUNDED = [
    ("9**9**9", "more than 4096 bits"),
    ("10**400", "too large"),
    ("2**99999999", "more than 4096 bits"),
    ("1/0", "divides by zero"),
    ("0**-1", "negative power"),
    ("1" * 2000, "2000 digits"),
    ("k1*exp(1000)", "exp(1000)"),
    ("k1*exp(-1000)", "exp"),
    ("k1*1e-400", "1e-400"),
    ("k1*1e-310", "1e-310"),
    ("k1 + 1e300*1e300", "too large"),
    ("k1*(1/3)**3000", "more than 4096 bits"),
    ("k1*sqrt(-2)", "square root of a negative"),
    ("k1*log(1-1)", "logarithm"),
    ("k1*(-8)**(1/3)", "non-integer power"),
    ("k1/(2-2)", "divides by zero"),
    ("k1**(9**9**9)", "more than 4096 bits"),
]


@pytest.mark.parametrize("rate, fragment", BOUNDED)
def test_constant_folding_is_bounded(tmp_path, rate, fragment):
    path = write(tmp_path, model_text(f'"{rate}"'))
    refused(path, "edge Apo->Holo", fragment)


@pytest.mark.parametrize("rate, fragment", BOUNDED[:6])
def test_constant_folding_is_bounded_in_api(rate, fragment):
    s = Scheme(origin="api")
    with hang_guard(), pytest.raises(ModelError) as info:
        s.add_edge("Apo", "Holo", rate)
    assert_one_line(str(info.value))
    assert str(info.value).startswith("api: edge Apo->Holo") and fragment in str(info.value)
    assert s.states == () and s.edges == ()  # nothing half-added


def test_constants_fold_exactly():
    # exact values by hand: 2**10 = 1024, 0.1 is read as the decimal 1/10 (not the double)
    from treeflux.compiler.parse import constant_value
    assert constant_value(parse_label("2**10/1024 + 0.1")) == Fraction(11, 10)
    assert constant_value(parse_label("(1/3)**3")) == Fraction(1, 27)
    assert constant_value(parse_label("sqrt(9/4)")) == Fraction(3, 2)
    assert constant_value(parse_label("0**0")) == 1  # Python's and IEEE pow's convention
    assert constant_value(parse_label("k*2")) is None
    assert parse_label("1e300") == ("num", Fraction(10) ** 300)


# ------------------------------------------------------------ positive constant rates (issue 8.5)

@pytest.mark.parametrize("rate", ['"-0.5"', '"0"', '"1-1"', '-0.5', '0', '"2*(3-4)"', '"-exp(1)"'])
def test_constant_rate_must_be_positive(tmp_path, rate):
    refused(write(tmp_path, model_text(rate)), "edge Apo->Holo", "must be positive")


@pytest.mark.parametrize("rate", ["k1*(1-1)", "0*k1", "(2-2)/k1", "-(0*k1)*k2", "k1*(k2*(3-3))"])
def test_rate_with_a_zero_factor_is_refused(rate):
    with pytest.raises(ModelError, match="constant factor 0"):
        Scheme(origin="m.toml").add_edge("Apo", "Holo", rate)
    Scheme().add_edge("Apo", "Holo", rate.replace("0", "5").replace("-", "+"))  # a positive variant loads


def test_constant_rate_refused_from_cli(tmp_path):
    res = cli_profile(write(tmp_path, model_text('"-0.5"')))
    assert res.returncode == 2 and res.stdout == ""
    lines = res.stderr.splitlines()
    assert len(lines) == 1 and "edge Apo->Holo" in lines[0] and "-0.5" in lines[0], res.stderr


def test_signed_symbols_load():
    text = model_text('"a0*exp(z*V/25.7)"', extra=(
        "[parameters]\na0 = { value = 2.0 }\nz = { value = -1.5, min = -3.0, max = 3.0 }\n"
        "[inputs]\nV = { value = -60.0, min = -120.0, max = 60.0 }\n"))
    import tempfile, pathlib
    with tempfile.TemporaryDirectory() as d:
        s = load(write(pathlib.Path(d), text, "channel.toml"))
        assert s.symbol("V").value == -60.0 and (s.symbol("V").min, s.symbol("V").max) == (-120.0, 60.0)
        assert s.symbol("z").value == -1.5
        bad = write(pathlib.Path(d), text.replace("value = -60.0", "value = -130.0"))
        refused(bad, "input 'V'", "outside [min, max]")


# ------------------------------------------------------------ encodings and names (issue 10.3)

def test_byte_order_mark_is_accepted(tmp_path):
    text = model_text('"k1*L"')
    plain = load(write(tmp_path, text, "plain.toml"))
    bom = load(write(tmp_path, b"\xef\xbb\xbf" + text.encode(), "bom.toml"))
    assert bom.canonical() == plain.canonical()


def test_non_utf8_file_is_one_line(tmp_path):
    raw = model_text('"k1"').replace('"demo"', '"demo" # caf\xe9').encode("latin-1")
    msg = refused(write(tmp_path, raw), "not UTF-8", "line 1")
    res = cli_profile(tmp_path / "bad.toml")
    assert res.returncode == 2 and res.stderr.splitlines() == [f"treeflux: {msg}"]


BAD_NAMES = ["A\nB", "A\x1b[31mred", "A\u202eB", "A\u200bB", "A\x00", "A\tB", "A\u2028B", " A", "A\u00a0B"]


@pytest.mark.parametrize("bad", BAD_NAMES)
@pytest.mark.parametrize("place", ["model", "state", "symbol", "observable", "observable state"])
def test_names_that_break_lines_are_refused(tmp_path, bad, place):
    q = '"' + bad.encode("unicode_escape").decode().replace('"', '\\"') + '"'
    if place == "model":
        text = model_text('"k1"', name=q)
    elif place == "state":
        text = model_text('"k1"', source=q)
    elif place == "symbol":
        text = model_text('"k1"', extra=f"[parameters]\nk1 = 1.0\n{q} = 2.0\n")
    elif place == "observable":
        text = model_text('"k1"') + f'\n[observables]\n{q} = {{ "Apo" = 1.0 }}\n'
    else:
        text = model_text('"k1"') + f'\n[observables]\nbound = {{ {q} = 1.0 }}\n'
    refused(write(tmp_path, text))


def test_names_refused_in_api_and_cli(tmp_path):
    with pytest.raises(ModelError) as info:
        Scheme(name="x\"\"\"\nimport os\n\"\"\"")
    assert_one_line(str(info.value))
    s = Scheme()
    with pytest.raises(ModelError) as info:
        s.add_edge("A\x1b]0;owned\x07", "B", "k")
    assert_one_line(str(info.value)) and "\\x1b" in str(info.value)
    with pytest.raises(ModelError):
        s.add_parameter("k 1", value=1.0)  # not usable in a rate
    with pytest.raises(ModelError):
        s.add_edge("A->", "B", "k")  # '->' separates the states of an edge
    res = cli_profile(write(tmp_path, model_text('"k1"', source='"Apo\\u001b[2J"')))
    assert res.returncode == 2 and len(res.stderr.splitlines()) == 1
    assert "\x1b" not in res.stderr and "U+001B" in res.stderr


def test_bad_file_origin_is_escaped(tmp_path):
    path = write(tmp_path, model_text('"-1"'), "evil\nname.toml")
    with pytest.raises(ModelError) as info:
        load(path)
    assert_one_line(str(info.value)) and "evil\\nname.toml" in str(info.value)


def test_non_ascii_letters_are_allowed(tmp_path):
    # Greek letters are usual in biophysics; a middle dot is usual in complex names
    text = model_text('"k_α*L"', source='"E·S"', extra="[parameters]\n\"k_α\" = 2.0\n[inputs]\nL = 1.0\n")
    text = text.replace('source = "Holo"\ntarget = "Apo"', 'source = "Holo"\ntarget = "E·S"')
    s = load(write(tmp_path, text))
    assert s.states == ("E·S", "Holo") and s.symbols == ("k_α", "L")


def test_flat_sums_up_to_the_length_limit():
    n = 390
    text = "+".join(f"k{i}" for i in range(n))
    assert len(text) <= MAX_LABEL_LENGTH
    label = parse_label(text)

    def depth(node):
        return 1 + max((depth(k) for k in node[1:] if isinstance(k, tuple)), default=0)
    assert label[0] == "add" and depth(label) <= 12  # a balanced tree: log2(390) < 9
    assert len(label) == 3  # every operation stays binary (the label format of the runtime)
    for op, join in (("sub", "-"), ("mul", "*"), ("mix", "+-")):
        chain = "".join(f"{join[i % len(join)] if i else ''}k{i}" for i in range(n))
        g = Graph()
        node = lower_label(g, parse_label(chain), {f"k{i}": i for i in range(n)})
        xs = [Fraction(i + 1, 7) for i in range(n)]
        # exact reference computed here with Fractions, left to right
        want = xs[0]
        for i, x in enumerate(xs[1:], 1):
            minus = op == "sub" or (op == "mix" and i % 2 == 1)
            want = want * x if op == "mul" else want - x if minus else want + x
        assert evaluate(g, [node], xs)[0] == want
    # compiles and evaluates: p(A) = k0 / (k0 + sum) for the two-state scheme A <-> B
    s = Scheme()
    s.add_edge("A", "B", "+".join(f"k{i}" for i in range(300)))
    s.add_edge("B", "A", "k0")
    m = compile_scheme(s)
    x = np.linspace(0.5, 2.0, 300)[None, :]
    p = m.steady_state(x)
    assert p[0, 0] == pytest.approx(x[0, 0] / (x[0, 0] + x.sum()), rel=1e-14)


def test_genuine_deep_nesting_is_one_line():
    with pytest.raises(ModelError) as info:
        parse_label("-" * (MAX_DEPTH + 5) + "k", where="m.toml: edge A->B")
    assert "nested" in str(info.value) and str(info.value).startswith("m.toml: edge A->B")
    deep = "k" + "**k" * (MAX_DEPTH + 5)
    with pytest.raises(ModelError):
        parse_label(deep)


def test_devices_and_folders_are_not_model_files(tmp_path):
    with hang_guard(), pytest.raises(ModelError, match="a device"):
        load("/dev/zero")
    with pytest.raises(ModelError) as info:
        load(tmp_path)
    assert_one_line(str(info.value)) and "cannot read" in str(info.value)
    with pytest.raises(ModelError, match="no such model file"):
        load(tmp_path / "missing.toml")


def test_deeply_nested_toml_is_one_line(tmp_path):
    refused(write(tmp_path, "a = " + "[" * 5000 + "]" * 5000 + "\n"), "nested")


# ------------------------------------------------------------ look-alike Unicode (issue 10.4)

LOOKALIKES = [
    ("ｋ1", "U+FF4B FULLWIDTH LATIN SMALL LETTER K", 1),
    ("k\u200b1", "U+200B ZERO WIDTH SPACE", 2),
    ("k1*\u202e2", "U+202E RIGHT-TO-LEFT OVERRIDE", 4),
    ("k1\u2066+k2", "U+2066 LEFT-TO-RIGHT ISOLATE", 3),
    ("\ufb01", "U+FB01 LATIN SMALL LIGATURE FI", 1),
    ("k\u00b2", "U+00B2 SUPERSCRIPT TWO", 2),
    ("\u212a1", "U+212A KELVIN SIGN", 1),
    ("k\u00a0+ 1", "U+00A0 NO-BREAK SPACE", 2),
    ("k1\u22122", "U+2212 MINUS SIGN", 3),
    ("ke\u0301", "U+0301 COMBINING ACUTE ACCENT", 3),
    ("k1\x1b[2J", "U+001B", 3),
]


@pytest.mark.parametrize("rate, char, pos", LOOKALIKES)
def test_lookalike_unicode_refused_in_rates(rate, char, pos):
    with pytest.raises(ModelError) as info:
        parse_label(rate, where="m.toml: edge A->B")
    msg = str(info.value)
    assert_one_line(msg)
    assert char in msg and f"position {pos}" in msg, msg


def test_python_would_fold_fullwidth_silently():
    # why the check exists: Python's identifier normalisation (NFKC, PEP 3131) reads ｋ1 as k1
    assert ast.parse("ｋ1", mode="eval").body.id == "k1"


@pytest.mark.parametrize("rate, char, pos", LOOKALIKES[:7])
def test_lookalike_unicode_refused_in_names(tmp_path, rate, char, pos):
    refused(write(tmp_path, model_text('"k1"', source=f'"{rate}"')), char, f"position {pos}")


# ------------------------------------------------------------ API inputs (issue 10.3)

@pytest.fixture(scope="module")
def model():
    s = Scheme()
    s.add_edge("A", "B", "k1*L")
    s.add_edge("B", "A", "k2")
    s.add_edge("B", "C", "k3")
    s.add_edge("C", "A", "k4")
    return compile_scheme(s)  # symbols k1, L, k2, k3, k4; states A, B, C


X = np.ones((3, 5))


def _readonly():
    out = np.zeros((3, 3))
    out.setflags(write=False)
    return out


BAD_CALLS = {
    "complex array": (lambda m: m.steady_state(X + 1j), "complex"),
    "complex in dict": (lambda m: m.steady_state({"k1": 1 + 2j}), "complex"),
    "masked array": (lambda m: m.steady_state(np.ma.array(X, mask=X > 2)), "masked"),
    "masked in dict": (lambda m: m.steady_state({"k1": np.ma.array([1.0, 2.0])}), "masked"),
    "object array": (lambda m: m.steady_state(np.array([[1, 2, 3, 4, None]], dtype=object)), "objects"),
    "Fractions": (lambda m: m.steady_state(np.array([[Fraction(1, 2)] * 5], dtype=object)), "objects"),
    "string array": (lambda m: m.steady_state(np.array([["1.0"] * 5])), "strings"),
    "string in dict": (lambda m: m.steady_state({"k1": "2.0"}), "string"),
    "strings in list": (lambda m: m.steady_state({"k1": ["1", "2"]}), "strings"),
    "bool in dict": (lambda m: m.steady_state({"k1": True}), "boolean"),
    "bool array": (lambda m: m.steady_state(X > 0), "booleans"),
    "huge int": (lambda m: m.steady_state({"k1": 10 ** 400}), "too large"),
    "ragged list": (lambda m: m.steady_state([[1, 2], [3]]), "expected numbers"),
    "None": (lambda m: m.steady_state(None), "None"),
    "text": (lambda m: m.steady_state("1,2,3,4,5"), "string"),
    "unknown name": (lambda m: m.steady_state({"k\x1b[31m": 1.0}), "\\x1b"),
    "out list": (lambda m: m.steady_state(X, out=[0.0] * 9), "list"),
    "out float32": (lambda m: m.steady_state(X, out=np.zeros((3, 3), np.float32)), "float32"),
    "out shape": (lambda m: m.steady_state(X, out=np.zeros((3, 4))), "(3, 3)"),
    "out strided": (lambda m: m.steady_state(X, out=np.zeros((3, 6))[:, ::2]), "C-contiguous"),
    "out Fortran": (lambda m: m.steady_state(np.ones((4, 5)), out=np.zeros((4, 3), order="F")), "C-contiguous"),
    "out read-only": (lambda m: m.steady_state(X, out=_readonly()), "read-only"),
    "out masked": (lambda m: m.steady_state(X, out=np.ma.zeros((3, 3))), "MaskedArray"),
    "threads str": (lambda m: m.steady_state(X, threads="2"), "threads"),
    "threads float": (lambda m: m.basis(X, threads=1.5), "threads"),
    "threads zero": (lambda m: m.steady_state(X, threads=0), "threads"),
    "threads negative": (lambda m: m.basis(X, threads=-1), "threads"),
    "threads bool": (lambda m: m.steady_state(X, threads=True), "threads"),
}


@pytest.mark.parametrize("case", list(BAD_CALLS))
def test_bad_api_inputs_are_one_line_evaluation_errors(model, case):
    call, fragment = BAD_CALLS[case]
    with pytest.raises(EvaluationError) as info:
        call(model)
    msg = str(info.value)
    assert "\n" not in msg and "np.float64" not in msg and fragment in msg, msg


@pytest.fixture(scope="module", params=["llvm", "c"])
def native_model(request):
    s = Scheme()
    s.add_edge("A", "B", "k1*L")
    s.add_edge("B", "A", "k2")
    s.add_edge("B", "C", "k3")
    s.add_edge("C", "A", "k4")
    return compile_scheme(s, backend=request.param)


@pytest.mark.parametrize("case", list(BAD_CALLS))
def test_bad_api_inputs_refused_alike_on_native_back_ends(native_model, case):
    """The native back ends' public call checks its arguments in C
    (native_call.c ``checked``) and declines what it cannot take: the
    validating path then gives the same one-line errors."""
    test_bad_api_inputs_are_one_line_evaluation_errors(native_model, case)


def test_native_public_call_takes_plain_arrays_in_one_call(native_model):
    m = native_model
    k = m._lean[0]
    # Matrix-Tree theorem by hand (k1, L, k2, k3, k4 = 2, 3, 5, 7, 11: rates A→B 6,
    # B→A 5, B→C 7, C→A 11): in-trees of A 5·11 + 7·11 = 132, of B 6·11 = 66,
    # of C 6·7 = 42, so p = (132, 66, 42)/240 = (0.55, 0.275, 0.175)
    row = np.array([[2.0, 3.0, 5.0, 7.0, 11.0]])
    np.testing.assert_allclose(m.steady_state(row), [[0.55, 0.275, 0.175]], rtol=1e-15)
    want = m.steady_state(X.astype(np.float32))        # the validating path (converts)
    out = np.empty((3, 3))
    if k._pool_checked is None:
        # no native_call extension here (no C compiler or no Python headers):
        # the C entry declines everything and the Python-checked call serves
        assert k.plain_check(X, out) is None
        assert m.steady_state(X, out=out) is out and np.array_equal(out, want)
        with pytest.raises(EvaluationError, match="read-only"):
            m.steady_state(X, out=_readonly())
        return
    assert k.plain_check(X, out) == 0 and np.array_equal(out, want)
    assert m.steady_state(X, out=out) is out and np.array_equal(out, want)
    # what the C checks decline: not an ndarray, wrong dtype, shape, layout, read-only, overlap
    assert k.plain_check(X.tolist(), out) is None
    assert k.plain_check(X.astype(np.float32), out) is None
    assert k.plain_check(X[:, :4].copy(), out) is None
    assert k.plain_check(np.asfortranarray(X), out) is None
    assert k.plain_check(X, np.empty((3, 4))) is None
    assert k.plain_check(X, _readonly()) is None
    assert k.plain_check(X, np.empty((3, 6))[:, ::2]) is None
    buf = np.ones(3 * 5 + 3 * 3)
    assert k.plain_check(buf[:15].reshape(3, 5), buf[6:15].reshape(3, 3)) is None
    sub = np.zeros((3, 3)).view(type("Sub", (np.ndarray,), {}))
    assert k.plain_check(X, sub) is None                # a subclass: the validating path takes it
    assert m.steady_state(X, out=sub) is sub and np.array_equal(sub, want)
    # a flagged row comes back with its status; the public call refuses it by name
    bad = X.copy()
    bad[1, 2] = -1.0
    status = k.plain_check(bad, np.empty((3, 3)))
    assert status.dtype == np.uint8 and status.tolist()[0] == 0 and status[1] != 0
    with pytest.raises(EvaluationError, match="row 1"):
        m.steady_state(bad)


def test_native_public_call_without_the_c_entry(native_model, monkeypatch):
    """Where native_call could not be built, the lean path checks the
    arguments in Python: same bits, same refusals, the flagged row named."""
    m = native_model
    k = m._lean[0]
    rng = np.random.default_rng(3)
    Xr = np.exp(rng.uniform(-5, 5, (700, 5)))
    want = m.steady_state(Xr)
    k._pooled()
    monkeypatch.setattr(k, "_pool_checked", None)
    assert k.plain_check(Xr, np.empty((700, 3))) is None
    out = np.empty((700, 3))
    assert m.steady_state(Xr, out=out, threads=2) is out and np.array_equal(out, want)
    assert np.array_equal(m.steady_state(Xr), want)
    with pytest.raises(EvaluationError, match="read-only"):
        m.steady_state(X, out=_readonly())
    Xr[650, 2] = 0.0
    with pytest.raises(EvaluationError, match="row 650"):
        m.steady_state(Xr)


def test_out_sharing_memory_with_inputs_is_refused(model):
    buf = np.ones(3 * 5 + 3 * 3)
    x, out = buf[:15].reshape(3, 5), buf[6:15].reshape(3, 3)  # both C-contiguous, overlapping
    with pytest.raises(EvaluationError, match="share memory"):
        model.steady_state(x, out=out)


def test_good_inputs_still_accepted(model):
    want = model.steady_state(X)
    assert np.allclose(want.sum(axis=1), 1.0)
    out = np.empty((3, 3))
    assert model.steady_state(X, out=out, threads=np.int64(2)) is out
    assert np.array_equal(out, want)
    assert np.array_equal(model.steady_state(np.ones((3, 5), dtype=np.int32)), want)
    assert np.array_equal(model.steady_state(np.ones((3, 5), dtype=np.float32)), want)
    assert np.array_equal(model.steady_state(np.array([[1, 1, 1, 1, 1]], dtype=object)), want[:1])
    assert np.array_equal(model.steady_state({"k1": [1, 1, 1], "L": 1.0, "k2": 1, "k3": 1, "k4": 1}), want)
    assert np.array_equal(model.steady_state(np.ma.getdata(np.ma.array(X))), want)


# ------------------------------------------------------------ mixed-script look-alikes

def test_names_drawn_alike_are_refused(tmp_path):
    # a Cyrillic А (U+0410) beside a Latin A: NFKC keeps them apart, a reader cannot
    text = model_text('"k1"').replace('source = "Holo"\ntarget = "Apo"', 'source = "Holo"\ntarget = "\u0410po"')
    refused(write(tmp_path, text), "'Apo' and 'Аpo' look alike", "U+0410 CYRILLIC CAPITAL LETTER A", "position 1")
    s = Scheme()
    s.add_edge("A", "B", "k\u043e")  # Cyrillic о
    s.add_edge("B", "A", "ko")
    with pytest.raises(ModelError, match="U\\+043E CYRILLIC SMALL LETTER O at position 2"):
        s.validate()


# ------------------------------------------------------------ the CLI: exit 2, one line

CLI_CASES = {
    "tower": model_text('"9**9**9"'),
    "huge power": model_text('"10**400"'),
    "division by zero": model_text('"1/0"'),
    "zero to negative": model_text('"0**-1"'),
    "2000 digits": model_text('"' + "7" * 2000 + '"'),
    "negative constant": model_text('"-0.5"'),
    "zero constant": model_text('"1-1"'),
    "fullwidth": model_text('"ｋ1"'),
    "zero width": model_text('"k\\u200b1"'),
    "bidi": model_text('"k1*\\u202e2"'),
    "newline state": model_text('"k1"', source='"Apo\\nHolo"'),
    "escape in name": model_text('"k1"', name='"demo\\u001b[2J"'),
    "deep TOML": "a = " + "[" * 3000 + "]" * 3000 + "\n",
}


@pytest.mark.parametrize("case", list(CLI_CASES))
def test_cli_refuses_with_one_line(tmp_path, capsys, case):
    path = write(tmp_path, CLI_CASES[case])
    with hang_guard():
        assert main(["profile", str(path)]) == 2
    captured = capsys.readouterr()
    lines = captured.err.splitlines()
    assert captured.out == "" and len(lines) == 1 and lines[0].startswith(f"treeflux: {path}"), captured.err
    assert_one_line(lines[0])


def test_cli_accepts_byte_order_mark_and_flat_sum(tmp_path, capsys):
    rate = '"' + "+".join(f"k{i}" for i in range(200)) + '"'
    path = write(tmp_path, b"\xef\xbb\xbf" + model_text(rate).encode())
    assert main(["profile", str(path)]) == 0
    assert "Apo" in capsys.readouterr().out


def test_cli_subprocess_tower_is_one_line(tmp_path):
    res = cli_profile(write(tmp_path, model_text('"9**9**9"')))
    assert res.returncode == 2 and res.stdout == ""
    assert res.stderr.count("\n") == 1 and "edge Apo->Holo" in res.stderr and "4096 bits" in res.stderr
