"""The compile cache on a shared machine: `cache clear` deletes only what it can
prove is treeflux's, clearing never breaks a running compile, and nothing in
an entry is loaded unless it is this user's, unwritable by others and sealed
with this user's key (tampered or planted entries are rebuilt, never run)."""

import hashlib
import json
import os
import subprocess
import sys
import textwrap
from pathlib import Path

import numpy as np
import pytest

from treeflux.compiler import compile_scheme
from treeflux.compiler.artifacts import model_key
from treeflux.compiler.cli import main
from treeflux.runtime import cache

from .schemes import independent_sites

OTHER_UID = 12345  # a user that is not us (the suite runs as root here, so chown works)
OPTIONS = {"jacobian": False, "log_jacobian": False, "input_derivatives": None, "name": "treeflux_model"}


@pytest.fixture
def cache_dir(tmp_path, monkeypatch):
    monkeypatch.setenv("TREEFLUX_CACHE_DIR", str(tmp_path / "cache"))
    cache.release_pins()
    yield tmp_path / "cache"
    cache.release_pins()


def _snapshot(folder: Path) -> dict:
    """Every path under ``folder`` (hidden ones too) with its content or kind."""
    out = {}
    for dirpath, dirnames, filenames in os.walk(folder):
        for d in dirnames:
            out[os.path.relpath(os.path.join(dirpath, d), folder)] = "dir"
        for f in filenames:
            p = os.path.join(dirpath, f)
            out[os.path.relpath(p, folder)] = Path(p).read_bytes() if not os.path.islink(p) else "link"
    return out


def _decoy(folder: Path) -> dict:
    """Someone's folder of files, subfolders (hidden ones too) and a name that
    looks like a cache key."""
    (folder / "thesis" / "chapters").mkdir(parents=True)
    (folder / "thesis" / "chapters" / "one.tex").write_text("results that took a year")
    (folder / ".ssh").mkdir()
    (folder / ".ssh" / "config").write_text("Host lab\n")
    (folder / ".hidden_dir" / ".deeper").mkdir(parents=True)
    (folder / ".hidden_dir" / ".deeper" / "x").write_text("x")
    (folder / ("ab" * 20)).mkdir()
    (folder / ("ab" * 20) / "data.csv").write_text("1,2\n")
    (folder / "notes.txt").write_text("do not delete")
    return _snapshot(folder)


def _run_cli(argv, capsys):
    status = main(argv)
    captured = capsys.readouterr()
    return status, captured.out, captured.err


# ------------------------------------------------------------------ clear

def test_clear_refuses_a_folder_that_is_not_a_cache(tmp_path, monkeypatch, capsys):
    home = tmp_path / "home" / "somewhere"
    home.mkdir(parents=True)
    before = _decoy(home)
    monkeypatch.setenv("TREEFLUX_CACHE_DIR", str(home))
    status, out, err = _run_cli(["cache", "clear"], capsys)
    assert status == 2 and out == ""
    assert err.count("\n") == 1 and "not a treeflux cache" in err and "nothing was touched" in err
    assert _snapshot(home) == before
    # Nor is such a folder adopted as a cache by a compile: refused, untouched.
    from treeflux.runtime.cache import CacheError
    with pytest.raises(CacheError, match="not treeflux's"):
        cache.fetch(cache.make_key("x"), lambda work: (work / "f").write_text("f"))
    assert _snapshot(home) == before


def test_clear_keeps_foreign_files_inside_a_real_cache(cache_dir, capsys):
    cache.shared_library("double twice(double x) { return 2 * x; }\n")
    cache.fetch(cache.make_key("a"), lambda work: (work / "a.txt").write_text("a"))
    # Foreign things put into the cache root afterwards, including a folder
    # named like an entry, hidden folders, and a copy of an entry with a file added.
    foreign = cache_dir / "foreign"
    foreign.mkdir()
    before = _decoy(foreign)
    for p in list(foreign.iterdir()):
        os.rename(p, cache_dir / p.name)
    real = next(p for p in cache_dir.iterdir() if len(p.name) == 40 and p.name != "ab" * 20)
    os.rmdir(foreign)
    assert main(["cache", "info"]) == 0
    info = json.loads(capsys.readouterr().out)
    assert info["entries"] == 2 and info["unverified"] == 5
    status, out, err = _run_cli(["cache", "clear"], capsys)
    assert status == 0 and err == ""
    assert out.startswith(f"removed 2 entries from {cache_dir}") and "left 5 items alone" in out
    assert not real.exists()
    after = _snapshot(cache_dir)
    for name, content in before.items():
        assert after[name] == content, name
    assert cache.info()["entries"] == 0


def test_clear_skips_an_entry_whose_files_were_changed(cache_dir):
    entry = cache.fetch(cache.make_key("b"), lambda work: (work / "b.txt").write_text("b"))
    (entry / "b.txt").write_text("someone's edit")
    assert cache.clear() == {"removed": 0, "in_use": 0, "kept": 1}
    assert (entry / "b.txt").read_text() == "someone's edit"


def test_clear_refuses_a_marker_of_another_form(cache_dir):
    cache.fetch(cache.make_key("c"), lambda work: (work / "c.txt").write_text("c"))
    (cache_dir / cache.MARKER).write_text("Signature: 8a477f597d28d172789f06886806bc55\n# someone else\n")
    with pytest.raises(cache.CacheError, match="not a treeflux cache marker"):
        cache.clear()
    assert len([p for p in cache_dir.iterdir() if len(p.name) == 40]) == 1


_HOLDER = textwrap.dedent("""
    import os, sys, time
    from pathlib import Path
    from treeflux.runtime import cache
    key, ready = sys.argv[1], Path(sys.argv[2])
    entry = cache.fetch(key, lambda work: (work / "lib.bin").write_bytes(b"L" * 50000))
    ready.write_text("fetched")
    time.sleep(1.5)          # the window between fetching an entry and loading it
    data = (entry / "lib.bin").read_bytes()
    print("ok" if data == b"L" * 50000 else "bad")
""")


def test_clear_does_not_pull_an_entry_from_under_a_running_process(cache_dir, tmp_path):
    key = cache.make_key("held")
    ready = tmp_path / "ready"
    env = dict(os.environ, TREEFLUX_CACHE_DIR=str(cache_dir))
    proc = subprocess.Popen([sys.executable, "-c", _HOLDER, key, str(ready)], env=env,
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    try:
        import time
        deadline = time.monotonic() + 60
        while not ready.exists() and time.monotonic() < deadline:
            time.sleep(0.02)
        assert ready.exists()
        counts = cache.clear()  # while the other process is between fetch and load
        assert counts["in_use"] == 1 and counts["removed"] == 0
    finally:
        out, err = proc.communicate(timeout=60)
    assert proc.returncode == 0, err
    assert out.strip() == "ok"
    assert cache.clear()["removed"] == 1  # once that process has ended, the entry goes


_COMPILER = textwrap.dedent("""
    import json, sys
    import numpy as np
    sys.path.insert(0, sys.argv[2])
    from treeflux.compiler import compile_scheme
    from tests.schemes import independent_sites
    X = np.array([[1.0, 2.0, 3.0, 4.0]])
    for i in range(int(sys.argv[1])):
        # a new name each round (a new entry and library to build) and the first again
        m = compile_scheme(independent_sites(2), method="elimination", backend="c",
                           name=f"round{i // 2 if i % 2 else 0}")
        print(json.dumps(dict(zip(m.states, m.steady_state(X)[0].tolist()))), flush=True)
""")


def test_clearing_in_a_loop_while_another_process_compiles(cache_dir):
    """A real compile (C back end, cached library loaded with ctypes) in another
    process, with `cache clear` run over and over meanwhile: every result right."""
    env = dict(os.environ, TREEFLUX_CACHE_DIR=str(cache_dir))
    root = str(Path(__file__).resolve().parent.parent)
    proc = subprocess.Popen([sys.executable, "-c", _COMPILER, "8", root], env=env,
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    in_use_seen = 0
    while proc.poll() is None:
        try:
            in_use_seen = max(in_use_seen, cache.clear()["in_use"])
        except cache.CacheError:  # the other process has not created the cache yet
            pass
    out, err = proc.communicate()
    assert proc.returncode == 0, err
    assert in_use_seen >= 1  # clearing did meet the other process's entries
    rows = [json.loads(line) for line in out.splitlines()]
    assert len(rows) == 8
    # Two independent two-state sites, on0=1, off0=2, on1=3, off1=4: site i is
    # on with probability on_i/(on_i+off_i) (1/3 and 3/7), by hand; a state is
    # the product over its sites.
    p_on = [1 / 3, 3 / 7]
    for row in rows:
        for bits, p in row.items():
            expected = np.prod([p_on[i] if b == "1" else 1 - p_on[i] for i, b in enumerate(bits)])
            assert abs(p - expected) < 1e-14, (bits, p, expected)


# ------------------------------------------------------------------ trust

def _entry(cache_dir: Path, scheme, backend="python") -> Path:
    return cache_dir / model_key(scheme, method="elimination", backend=backend, options=OPTIONS)


def _poison_python_source(entry: Path, canary: Path, *, reseal_with=None) -> None:
    """Edit the generated Python source in model.json to create ``canary`` when
    executed, then recompute the manifest's hash (and, with ``reseal_with``,
    even its HMAC: an attacker who somehow had the key)."""
    record = json.loads((entry / "model.json").read_text())
    record["args"][0] = f"open({str(canary)!r}, 'w').write('ran')\n" + record["args"][0]
    (entry / "model.json").write_text(json.dumps(record, sort_keys=True))
    manifest = json.loads((entry / cache.MANIFEST).read_text())
    manifest["files"]["model.json"] = hashlib.sha256((entry / "model.json").read_bytes()).hexdigest()
    if reseal_with is not None:
        manifest["mac"] = cache._mac(reseal_with, entry.name, manifest["files"])
    (entry / cache.MANIFEST).write_text(json.dumps(manifest, sort_keys=True))


X2 = np.array([[1.0, 2.0, 3.0, 4.0], [0.5, 0.1, 9.0, 2.0]])


def test_tampered_entry_with_recomputed_hash_is_rebuilt_not_run(cache_dir, tmp_path):
    s = independent_sites(2)
    first = compile_scheme(s, method="elimination")
    entry = _entry(cache_dir, s)
    assert entry.is_dir()
    canary = tmp_path / "canary"
    _poison_python_source(entry, canary)
    again = compile_scheme(s, method="elimination")
    assert not canary.exists()
    assert again.profile.get("cache") is None  # rebuilt, not a hit
    assert np.array_equal(again.steady_state(X2), first.steady_state(X2))
    moved = list((cache_dir / cache.UNTRUSTED).iterdir())
    assert len(moved) == 1 and moved[0].name.startswith(entry.name)  # kept aside, not deleted
    third = compile_scheme(s, method="elimination")
    assert third.profile["cache"] == "hit" and not canary.exists()


@pytest.mark.parametrize("attack", ["chown", "group-writable-file", "world-writable-entry", "symlinked-file"])
def test_entry_that_is_not_ours_alone_is_never_loaded(cache_dir, tmp_path, attack):
    """Even sealed with the right key, an entry planted by another user, or one
    that others could have changed, is not run."""
    s = independent_sites(2)
    first = compile_scheme(s, method="elimination")
    entry = _entry(cache_dir, s)
    canary = tmp_path / "canary"
    secret = (cache_dir / cache.SECRET).read_bytes()
    _poison_python_source(entry, canary, reseal_with=secret)
    if attack == "chown":
        for p in [entry, *entry.iterdir()]:
            os.chown(p, OTHER_UID, OTHER_UID)
    elif attack == "group-writable-file":
        os.chmod(entry / "model.json", 0o664)
    elif attack == "world-writable-entry":
        os.chmod(entry, 0o777)
    else:
        elsewhere = tmp_path / "elsewhere.json"
        os.rename(entry / "model.json", elsewhere)
        os.symlink(elsewhere, entry / "model.json")
    again = compile_scheme(s, method="elimination")
    assert not canary.exists()
    assert again.profile.get("cache") is None
    assert np.array_equal(again.steady_state(X2), first.steady_state(X2))


def test_control_a_resealed_entry_of_ours_is_loaded(cache_dir, tmp_path):
    """The control for the test above: the same poisoned entry, sealed with the
    key and left ours alone, IS loaded — so the attacks fail for the reasons
    named there, and the key file must stay private."""
    s = independent_sites(2)
    compile_scheme(s, method="elimination")
    canary = tmp_path / "canary"
    _poison_python_source(_entry(cache_dir, s), canary, reseal_with=(cache_dir / cache.SECRET).read_bytes())
    compile_scheme(s, method="elimination")
    assert canary.exists()
    assert oct((cache_dir / cache.SECRET).stat().st_mode & 0o777) == "0o600"


_CANARY_C = """
#include <stdio.h>
__attribute__((constructor)) static void planted(void) {
    FILE *f = fopen("%s", "w");
    if (f) { fputs("ran", f); fclose(f); }
}
double twice(double x) { return 3 * x; }
"""


def test_swapped_shared_library_is_rebuilt_not_loaded(cache_dir, tmp_path):
    import ctypes
    source = "double twice(double x) { return 2 * x; }\n"
    lib = cache.shared_library(source)
    canary = tmp_path / "canary"
    evil_c = tmp_path / "evil.c"
    evil_c.write_text(_CANARY_C % canary)
    subprocess.run(["cc", "-shared", "-fPIC", "-o", str(lib), str(evil_c)], check=True)
    manifest = json.loads((lib.parent / cache.MANIFEST).read_text())
    manifest["files"][lib.name] = hashlib.sha256(lib.read_bytes()).hexdigest()
    (lib.parent / cache.MANIFEST).write_text(json.dumps(manifest, sort_keys=True))
    again = cache.shared_library(source)
    f = ctypes.CDLL(str(again)).twice
    f.restype, f.argtypes = ctypes.c_double, [ctypes.c_double]
    assert f(21.0) == 42.0
    assert not canary.exists()


def test_unsafe_cache_root_is_refused_in_one_line(cache_dir, tmp_path, capsys, monkeypatch):
    model = tmp_path / "m.toml"
    model.write_text('name = "m"\n[parameters]\nk = { value = 1.0 }\n'
                     '[[edges]]\nsource = "A"\ntarget = "B"\nrate = "k"\n'
                     '[[edges]]\nsource = "B"\ntarget = "A"\nrate = "2*k"\n')
    assert main(["eval", str(model), "--backend", "c"]) == 0
    capsys.readouterr()
    os.chmod(cache_dir, 0o777)
    status, out, err = _run_cli(["eval", str(model), "--backend", "c"], capsys)
    assert status == 2 and err.count("\n") == 1 and "writable by other users" in err
    os.chmod(cache_dir, 0o700)
    os.chown(cache_dir, OTHER_UID, OTHER_UID)
    status, out, err = _run_cli(["eval", str(model)], capsys)
    assert status == 2 and err.count("\n") == 1 and f"owned by uid {OTHER_UID}" in err
    status, out, err = _run_cli(["cache", "clear"], capsys)
    assert status == 2 and err.count("\n") == 1


def test_parent_folders_must_not_be_open_to_others(tmp_path, monkeypatch):
    shared = tmp_path / "shared"
    shared.mkdir()
    monkeypatch.setenv("TREEFLUX_CACHE_DIR", str(shared / "mine"))
    os.chmod(shared, 0o777)  # anyone could swap "mine" for a folder of theirs
    with pytest.raises(cache.CacheError, match="writable by other users"):
        cache.fetch(cache.make_key("p"), lambda work: (work / "p").write_text("p"))
    os.chmod(shared, 0o1777)  # sticky, as /tmp: only the owner can rename "mine"
    entry = cache.fetch(cache.make_key("p"), lambda work: (work / "p").write_text("p"))
    assert (entry / "p").read_text() == "p"
    cache.release_pins()


def test_group_umask_does_not_make_entries_untrusted(cache_dir):
    """With a umask of 002 (common for per-user groups) files are built
    group-writable; sealing drops that, so the entry is still reused."""
    old = os.umask(0o002)
    try:
        builds = []
        key = cache.make_key("umask")

        def build(work):
            builds.append(1)
            (work / "f.txt").write_text("f")

        cache.fetch(key, build)
        cache.fetch(key, build)
    finally:
        os.umask(old)
    assert builds == [1]
