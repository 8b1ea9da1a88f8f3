"""Scheme building, the safe label parser and the model-file loader: every
refusal in DESIGN.md's "Bad input" list, each a one-line message."""

from pathlib import Path

import pytest

from treeflux.compiler import ModelError, Scheme, load
from treeflux.compiler.parse import label_symbols, parse_label

EXAMPLES = Path(__file__).resolve().parent.parent / "examples"


def write(tmp_path, text, name="m.toml"):
    p = tmp_path / name
    p.write_text(text)
    return p


BASE = """
name = "t"
[parameters]
k1 = { value = 1.0 }
k2 = { value = 2.0 }
[[edges]]
source = "A"
target = "B"
rate = "k1"
"""


def test_parse_arithmetic():
    assert parse_label("k1*c") == ("mul", ("sym", "k1"), ("sym", "c"))
    lab = parse_label("2*k**2/(1+exp(-x)) - sqrt(y) + log(z)")
    assert label_symbols(lab) == ["k", "x", "y", "z"]
    assert parse_label(3) == ("num", 3)


@pytest.mark.parametrize("text, fragment", [
    ("k1 +", "malformed"),
    ("__import__('os').system('echo hi')", "underscore"),
    ("k.real", "not arithmetic"),
    ("open('x')", "call to 'open'"),
    ("exp(a, b)", "exactly one argument"),
    ("k[0]", "not arithmetic"),
    ("lambda: 0", "not arithmetic"),
    ("k if k else 1", "not arithmetic"),
    ("'text'", "only numbers"),
    ("_k", "underscore"),
    ("(" * 100 + "k" + ")" * 100, "nested"),
    ("k" * 3000, "longer than"),
    ("", "empty"),
    ("1e400", "non-finite"),
])
def test_label_refusals(text, fragment):
    with pytest.raises(ModelError) as info:
        parse_label(text, where="m.toml: edge A->B")
    msg = str(info.value)
    assert fragment in msg and "\n" not in msg and msg.startswith("m.toml: edge A->B")


def test_model_file_cannot_run_code(tmp_path):
    marker = tmp_path / "pwned"
    text = BASE.replace('rate = "k1"', f'rate = "__import__(\'os\').system(\'touch {marker}\')"')
    with pytest.raises(ModelError):
        load(write(tmp_path, text))
    text = BASE.replace('rate = "k1"', f'rate = "eval(\'open(\\"{marker}\\", \\"w\\")\')"')
    with pytest.raises(ModelError):
        load(write(tmp_path, text))
    assert not marker.exists()


@pytest.mark.parametrize("edit, fragment", [
    (lambda t: t.replace('target = "B"', 'target = "A"'), "self-loop"),
    (lambda t: t + '[[edges]]\nsource = "A"\ntarget = "B"\nrate = "k2"\n', "duplicate edge"),
    (lambda t: t.replace('rate = "k1"', 'rate = "k3"'), "undeclared symbol 'k3'"),
    (lambda t: t + '[observables]\nx = { "C" = 1.0 }\n', "unknown state 'C'"),
    (lambda t: t.replace("k1 = { value = 1.0 }", "k1 = { value = 1.0, colour = 1 }"), "unknown key"),
    (lambda t: t.replace('rate = "k1"\n', ""), "missing 'rate'"),
    (lambda t: t.replace("[[edges]]", "[[edge]]"), "unknown top-level"),
    (lambda t: t + "\n[[edges\n", "not valid TOML"),
    (lambda t: t.replace("k1 = { value = 1.0 }", "k1 = { value = 'a' }"), "must be a number"),
    (lambda t: t.replace("k1 = { value = 1.0 }", "k1 = { value = 1.0, min = 2.0, max = 1.0 }"), "greater than max"),
])
def test_model_file_refusals(tmp_path, edit, fragment):
    with pytest.raises(ModelError) as info:
        load(write(tmp_path, edit(BASE)))
    msg = str(info.value)
    assert fragment in msg, msg
    assert "\n" not in msg and "m.toml" in msg


def test_empty_scheme_and_missing_file(tmp_path):
    with pytest.raises(ModelError, match="empty scheme"):
        load(write(tmp_path, 'name = "nothing"\n'))
    with pytest.raises(ModelError, match="no such model file"):
        load(tmp_path / "absent.toml")
    with pytest.raises(ModelError, match="empty scheme"):
        Scheme().validate()


def test_implicit_symbols():
    s = Scheme()
    s.add_edge("A", "B", "a*c")
    s.add_edge("B", "A", "b")
    assert s.implicit_symbols and s.symbols == ("a", "c", "b")
    s2 = Scheme()
    s2.add_parameter("a")
    s2.add_edge("A", "B", "a*c")
    with pytest.raises(ModelError, match="undeclared symbol 'c'"):
        s2.validate()


def test_examples_load():
    names = sorted(p.name for p in EXAMPLES.glob("*.toml"))
    assert len(names) >= 4
    for p in EXAMPLES.glob("*.toml"):
        s = load(p)
        assert len(s.states) >= 3 and s.symbols
    promoter = load(EXAMPLES / "promoter_two_activators.toml")
    assert len(promoter.states) == 8 and len(promoter.edges) == 24


def test_canonical_hash_is_stable():
    a, b = Scheme(), Scheme()
    for s in (a, b):
        s.add_edge("A", "B", "k1 * c")
        s.add_edge("B", "A", "k2")
    assert a.content_hash() == b.content_hash()
    b.add_edge("A", "C", "k3")
    assert a.content_hash() != b.content_hash()
