"""Output writes (`compile -o`, `emit`, `sample --out`, `--plot`): an exclusive
temporary in the target folder renamed into place; never through a symlink,
never over a FIFO or device; multi-file emits all-or-nothing; umask
permissions; an unsupported plot format refused before any computation."""

import io
import os
import stat
from pathlib import Path

import numpy as np
import pytest

from treeflux.compiler import compile_scheme
from treeflux.compiler.cli import main
from treeflux.runtime import safe_io
from treeflux.runtime.safe_io import OutputError, output_path, write_file, write_files

from .schemes import independent_sites
from .test_cli_analysis import SWITCH  # an invented two-state switch, input s



@pytest.fixture(autouse=True)
def cache_dir(tmp_path, monkeypatch):
    monkeypatch.setenv("TREEFLUX_CACHE_DIR", str(tmp_path / "cache"))


@pytest.fixture
def model(tmp_path):
    path = tmp_path / "switch.toml"
    path.write_text(SWITCH)
    return path


@pytest.fixture
def decoy(tmp_path):
    path = tmp_path / "precious.txt"
    path.write_text("a colleague's data")
    return path


def _leftovers(folder: Path) -> list:
    return sorted(p.name for p in folder.iterdir() if ".tmp" in p.name or p.name.endswith(".old"))


def _cli(argv, capsys):
    status = main([str(a) for a in argv])
    out, err = capsys.readouterr()
    return status, out, err


# ------------------------------------------------------------------ safe_io itself

def test_symlink_at_the_target_is_refused_and_its_target_untouched(tmp_path, decoy):
    link = tmp_path / "out.csv"
    link.symlink_to(decoy)
    with pytest.raises(OutputError, match="symbolic link"):
        write_file(link, "new")
    assert decoy.read_text() == "a colleague's data" and link.is_symlink()
    assert _leftovers(tmp_path) == []


def test_fifo_and_device_targets_are_refused(tmp_path):
    fifo = tmp_path / "pipe"
    os.mkfifo(fifo)
    with pytest.raises(OutputError, match="not a regular file"):  # and never blocks opening it
        write_file(fifo, "x")
    assert stat.S_ISFIFO(os.lstat(fifo).st_mode)
    with pytest.raises(OutputError, match="not a regular file"):
        write_file("/dev/null", "x")
    with pytest.raises(OutputError, match="not a regular file"):
        write_file(tmp_path, "x")  # a folder
    with pytest.raises(OutputError, match="does not exist"):
        write_file(tmp_path / "missing" / "f.txt", "x")
    assert _leftovers(tmp_path) == []


def test_symlink_planted_at_the_temporary_name_is_not_followed(tmp_path, decoy, monkeypatch):
    names = iter(["aaaaaaaaaaaa", "bbbbbbbbbbbb"])
    monkeypatch.setattr(safe_io.secrets, "token_hex", lambda n: next(names))
    trap = tmp_path / ".out.txt.aaaaaaaaaaaa.tmp"
    trap.symlink_to(decoy)
    write_file(tmp_path / "out.txt", "fresh")
    assert (tmp_path / "out.txt").read_text() == "fresh"
    assert decoy.read_text() == "a colleague's data"
    assert trap.is_symlink()  # not ours: left where it was


@pytest.mark.parametrize("mask", [0o022, 0o002, 0o077])
def test_files_get_the_umask_permissions(tmp_path, mask):
    old = os.umask(mask)
    try:
        write_file(tmp_path / "a.txt", "a")
        with output_path(tmp_path / "b.bin") as tmp:
            tmp.write_bytes(b"b")
    finally:
        os.umask(old)
    for name in ("a.txt", "b.bin"):
        assert stat.S_IMODE((tmp_path / name).stat().st_mode) == 0o666 & ~mask


def _old_pair(folder: Path):
    (folder / "m.c").write_text("old c")
    (folder / "m.h").write_text("old h")


def _fail_second(monkeypatch, name, exc):
    """Make the second call of ``os.<name>`` inside safe_io raise ``exc``."""
    real, calls = getattr(os, name), []

    def failing(*args):
        calls.append(args)
        if len(calls) == 2:
            raise exc
        return real(*args)

    monkeypatch.setattr(safe_io.os, name, failing)


def test_failed_second_rename_puts_everything_back(tmp_path, monkeypatch):
    _old_pair(tmp_path)
    _fail_second(monkeypatch, "replace", OSError(28, "No space left on device"))
    with pytest.raises(OutputError, match="No space left on device"):
        write_files({tmp_path / "m.c": "new c", tmp_path / "m.h": "new h", tmp_path / "m.json": "{}"})
    monkeypatch.undo()
    assert (tmp_path / "m.c").read_text() == "old c" and (tmp_path / "m.h").read_text() == "old h"
    assert not (tmp_path / "m.json").exists()
    assert _leftovers(tmp_path) == []


def test_rollback_without_hard_links_restores_a_copy(tmp_path, monkeypatch):
    """Where the file system refuses hard links, the old files are kept as copies."""
    _old_pair(tmp_path)
    os.chmod(tmp_path / "m.c", 0o640)

    def no_links(*args, **kwargs):
        raise OSError(1, "Operation not permitted")

    monkeypatch.setattr(safe_io.os, "link", no_links)
    _fail_second(monkeypatch, "replace", OSError(28, "No space left on device"))
    with pytest.raises(OutputError, match="No space left on device"):
        write_files({tmp_path / "m.c": "new c", tmp_path / "m.h": "new h"})
    monkeypatch.undo()
    assert (tmp_path / "m.c").read_text() == "old c" and (tmp_path / "m.h").read_text() == "old h"
    assert stat.S_IMODE((tmp_path / "m.c").stat().st_mode) == 0o640
    assert _leftovers(tmp_path) == []


def test_interrupt_during_publication_rolls_back_and_propagates(tmp_path, monkeypatch):
    _old_pair(tmp_path)
    _fail_second(monkeypatch, "replace", KeyboardInterrupt())
    with pytest.raises(KeyboardInterrupt):
        write_files({tmp_path / "m.c": "new c", tmp_path / "m.h": "new h"})
    monkeypatch.undo()
    assert (tmp_path / "m.c").read_text() == "old c" and (tmp_path / "m.h").read_text() == "old h"
    assert _leftovers(tmp_path) == []


def test_failed_second_write_touches_nothing(tmp_path, monkeypatch):
    _old_pair(tmp_path)
    _fail_second(monkeypatch, "fsync", OSError(5, "Input/output error"))
    with pytest.raises(OutputError, match="Input/output error"):
        write_files({tmp_path / "m.c": "new c", tmp_path / "m.h": "new h"})
    monkeypatch.undo()
    assert (tmp_path / "m.c").read_text() == "old c" and (tmp_path / "m.h").read_text() == "old h"
    assert _leftovers(tmp_path) == []


def test_symlink_at_any_name_refuses_the_whole_set_before_writing(tmp_path, decoy):
    _old_pair(tmp_path)
    (tmp_path / "m.json").symlink_to(decoy)
    with pytest.raises(OutputError, match="symbolic link"):
        write_files({tmp_path / "m.c": "new c", tmp_path / "m.h": "new h", tmp_path / "m.json": "{}"})
    assert (tmp_path / "m.c").read_text() == "old c" and decoy.read_text() == "a colleague's data"
    assert _leftovers(tmp_path) == []


def test_output_path_publishes_or_leaves_nothing(tmp_path):
    target = tmp_path / "fig.png"
    target.write_bytes(b"old")
    with pytest.raises(RuntimeError):
        with output_path(target) as tmp:
            tmp.write_bytes(b"half")
            raise RuntimeError("writer failed")
    assert target.read_bytes() == b"old"
    assert [p.name for p in tmp_path.iterdir()] == ["fig.png"]  # private folder gone too
    with output_path(target) as tmp:
        assert tmp.suffix == ".png" and stat.S_IMODE(tmp.parent.stat().st_mode) == 0o700
        tmp.write_bytes(b"new")
    assert target.read_bytes() == b"new" and [p.name for p in tmp_path.iterdir()] == ["fig.png"]


# ------------------------------------------------------------------ emit and compile -o

def test_emit_failure_keeps_the_old_sources(tmp_path, monkeypatch):
    model = compile_scheme(independent_sites(2), method="elimination")
    out = tmp_path / "gen"
    first = model.emit("c", out)
    assert len(first) >= 2
    old = {p.name: p.read_bytes() for p in first}
    for p in first:  # make every file differ from what emit will write
        p.write_bytes(b"/* previous version */\n" + old[p.name])
    before = {p.name: p.read_bytes() for p in first}
    _fail_second(monkeypatch, "replace", OSError(28, "No space left on device"))
    with pytest.raises(OutputError):
        model.emit("c", out)
    monkeypatch.undo()
    assert {p.name: p.read_bytes() for p in out.iterdir()} == before
    again = model.emit("c", out)
    assert {p.name: p.read_bytes() for p in again} == old


def test_compile_refuses_a_symlinked_output_in_one_line(tmp_path, model, decoy, capsys):
    out = tmp_path / "gen"
    assert _cli(["compile", model, "--target", "c", "-o", out], capsys)[0] == 0
    names = sorted(p.name for p in out.iterdir())
    victim = out / names[0]
    victim.unlink()
    victim.symlink_to(decoy)
    others = {n: (out / n).read_bytes() for n in names[1:]}
    status, stdout, err = _cli(["compile", model, "--target", "c", "-o", out], capsys)
    assert status == 2 and err.count("\n") == 1 and "symbolic link" in err and "Traceback" not in err
    assert decoy.read_text() == "a colleague's data"
    assert {n: (out / n).read_bytes() for n in names[1:]} == others
    assert _leftovers(out) == []
    (tmp_path / "file").write_text("x")
    status, _, err = _cli(["compile", model, "--target", "c", "-o", tmp_path / "file"], capsys)
    assert status == 2 and "not a folder" in err


# ------------------------------------------------------------------ sample --out, --plot

def _no_computation(monkeypatch):
    import treeflux.compiler.cli_analysis as ca

    def refuse(*args, **kwargs):
        raise AssertionError("computation started before the output was checked")
    monkeypatch.setattr(ca, "_compile", refuse)


@pytest.mark.parametrize("name", ["fig.jpg", "fig.txt", "fig", "fig.PNG.exe"])
@pytest.mark.parametrize("command", ["response", "sample"])
def test_unsupported_plot_format_is_refused_before_computing(tmp_path, model, capsys, monkeypatch,
                                                             name, command):
    _no_computation(monkeypatch)
    args = (["response", model, "--observable", "on", "--input", "s", "--range", "0.1:10"]
            if command == "response" else ["sample", model, "--n", "10"])
    status, out, err = _cli([*args, "--plot", tmp_path / name], capsys)
    assert status == 2 and out == "" and err.count("\n") == 1
    assert "unsupported figure format" in err and ".png, .svg, .pdf" in err
    assert not (tmp_path / name).exists()


def test_sample_out_to_symlink_or_fifo_is_refused_before_computing(tmp_path, model, decoy,
                                                                  capsys, monkeypatch):
    _no_computation(monkeypatch)
    link = tmp_path / "table.csv"
    link.symlink_to(decoy)
    status, _, err = _cli(["sample", model, "--n", "10", "--out", link], capsys)
    assert status == 2 and err.count("\n") == 1 and "symbolic link" in err
    fifo = tmp_path / "fifo.csv"
    os.mkfifo(fifo)
    status, _, err = _cli(["sample", model, "--n", "10", "--out", fifo], capsys)
    assert status == 2 and err.count("\n") == 1 and "not a regular file" in err
    status, _, err = _cli(["response", model, "--observable", "on", "--input", "s",
                           "--range", "0.1:10", "--plot", tmp_path / "fig.png.lnk"], capsys)
    assert status == 2  # wrong format again, not computed
    (tmp_path / "fig.png").symlink_to(decoy)
    status, _, err = _cli(["response", model, "--observable", "on", "--input", "s",
                           "--range", "0.1:10", "--plot", tmp_path / "fig.png"], capsys)
    assert status == 2 and "symbolic link" in err
    assert decoy.read_text() == "a colleague's data" and stat.S_ISFIFO(os.lstat(fifo).st_mode)


def test_sample_table_and_plots_are_written_with_umask_permissions(tmp_path, model, capsys):
    table, fig = tmp_path / "t.csv", tmp_path / "s.svg"
    status, out, err = _cli(["sample", model, "--n", "20", "--seed", "3", "--out", table,
                             "--plot", fig], capsys)
    assert status == 0, err
    mode = 0o666 & ~_umask()
    assert stat.S_IMODE(table.stat().st_mode) == mode and stat.S_IMODE(fig.stat().st_mode) == mode
    data = np.loadtxt(table, delimiter=",", skiprows=1)
    assert data.shape[0] == 20
    # The switch's steady state by hand: P(On) = kon*s / (kon*s + koff), input s at its value 1.
    header = table.read_text().splitlines()[0].split(",")
    kon, koff = (data[:, header.index(c)] for c in ("kon", "koff"))
    assert np.allclose(data[:, header.index("p_On")], kon / (kon + koff), rtol=1e-12)
    assert fig.read_text().lstrip().startswith("<?xml")
    npz = tmp_path / "t.npz"
    assert _cli(["sample", model, "--n", "5", "--out", npz], capsys)[0] == 0
    with np.load(npz) as z:
        assert z["data"].shape[0] == 5 and list(z["columns"]) == header
    png = tmp_path / "r.png"
    status, _, err = _cli(["response", model, "--observable", "on", "--input", "s",
                           "--range", "0.1:10", "--plot", png], capsys)
    assert status == 0, err
    assert png.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"  # PNG signature (the PNG specification)
    assert _leftovers(tmp_path) == [] and not [p for p in tmp_path.iterdir() if p.name.endswith(".tmpdir")]


def _umask() -> int:
    mask = os.umask(0)
    os.umask(mask)
    return mask
