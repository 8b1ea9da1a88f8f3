"""Every failure of the `treeflux` command is one line on stderr with a fixed exit status:
2 for bad input and refused requests, 130 for Ctrl-C, 1 for an internal error;
a closed output pipe ends quietly; no partial output."""

import os
import subprocess
import sys
from pathlib import Path

import pytest

from treeflux.compiler import cli
from treeflux.compiler.cli import main
from treeflux.runtime import progress

EXAMPLES = Path(__file__).resolve().parent.parent / "examples"
ENZYME = EXAMPLES / "enzyme_competitive_inhibitor.toml"


def fails(capsys, argv, status=2):
    """Run the command in-process; the exit status and the single stderr line."""
    assert main([str(a) for a in argv]) == status
    captured = capsys.readouterr()
    lines = captured.err.splitlines()
    assert len(lines) == 1, captured.err
    assert lines[0].startswith("treeflux: ")
    return lines[0], captured.out


def run(argv, env=None, **kw):
    """Run the command in a fresh interpreter (signals, pipes, compilers)."""
    full = dict(os.environ, **(env or {}))
    return subprocess.run([sys.executable, "-c", "import sys; from treeflux.compiler.cli import main; "
                           "sys.exit(main())", *map(str, argv)],
                          capture_output=True, text=True, env=full, timeout=300, **kw)


# ------------------------------------------------------------------ argument errors

@pytest.mark.parametrize("argv, words", [
    (["profile"], "required"),
    (["profile", ENZYME, "--method", "magic"], "invalid choice"),
    (["nonsense"], "invalid choice"),
    (["sample", ENZYME, "--n", "10", "--seed", "-1"], "seed"),
    (["fit", ENZYME, "x.csv", "--seed", "-3"], "seed"),
    (["sample", ENZYME, "--n", "0"], "at least 1"),
    (["sample", ENZYME, "--n", "2.5"], "not an integer"),
    (["response", ENZYME, "--observable", "saturation", "--input", "S", "--range", "1:10",
      "--points", "many"], "not an integer"),
])
def test_argument_errors_are_one_line(capsys, argv, words):
    line, out = fails(capsys, argv)
    assert words in line and "usage:" not in line
    assert out == ""


def test_missing_model_file_is_one_line(capsys, tmp_path):
    line, _ = fails(capsys, ["profile", tmp_path / "absent.toml"])
    assert "absent.toml" in line


# ------------------------------------------------------------------ request guards

def test_too_many_workers_refused(capsys):
    cores = os.cpu_count() or 1
    line, _ = fails(capsys, ["sample", ENZYME, "--n", "10", "--workers", "300"])
    assert "300 worker processes" in line and f"{cores} core" in line


def test_huge_sample_refused_with_memory_estimate(capsys):
    line, out = fails(capsys, ["sample", ENZYME, "--n", "1e10"])
    assert "--n 10,000,000,000" in line and "memory" in line and "GB" in line
    assert out == ""


def test_huge_response_grid_refused_with_memory_estimate(capsys):
    line, _ = fails(capsys, ["response", ENZYME, "--observable", "saturation", "--input", "S",
                             "--range", "0.01:1000", "--points", "1e9"])
    assert "--points 1,000,000,000" in line and "memory" in line


def test_million_fit_starts_refused_with_time_estimate(capsys, tmp_path, monkeypatch):
    data = tmp_path / "data.csv"
    data.write_text("S,saturation\n1,0.1\n10,0.5\n100,0.8\n")
    monkeypatch.setenv("TREEFLUX_TIME_BUDGET", "5")
    line, out = fails(capsys, ["fit", ENZYME, data, "--starts", "1000000", "--set", "I=0"])
    assert "1,000,000 starts would take about" in line and "time budget of 5 s" in line
    assert out == ""


# ------------------------------------------------------------------ data files

def test_non_utf8_csv_is_one_line(capsys, tmp_path):
    data = tmp_path / "latin1.csv"
    data.write_bytes("S,saturation\n1,0.5\n# caf\xe9\n".encode("latin-1"))
    line, _ = fails(capsys, ["fit", ENZYME, data])
    assert "latin1.csv" in line and "UTF-8" in line and "0xe9" in line


def test_csv_with_byte_order_mark_is_accepted(tmp_path):
    from treeflux.runtime.fitting import read_table
    data = tmp_path / "bom.csv"
    data.write_bytes(b"\xef\xbb\xbfS,saturation\n1,0.25\n")
    table = read_table(data)
    assert list(table) == ["S", "saturation"]
    assert table["S"].tolist() == [1.0] and table["saturation"].tolist() == [0.25]


# ------------------------------------------------------------------ interrupts and bugs

def _boom(exc):
    def handler(args):
        print("partial output that must not appear")
        raise exc
    return handler


def _patch_handler(monkeypatch, handler):
    real = cli.build_parser

    def parser():
        p = real()
        for action in p._subparsers._group_actions:
            for sub in action.choices.values():
                sub.set_defaults(handler=handler)
        return p
    monkeypatch.setattr(cli, "build_parser", parser)


def test_ctrl_c_is_one_line_status_130_no_partial_output(capsys, monkeypatch):
    _patch_handler(monkeypatch, _boom(KeyboardInterrupt()))
    line, out = fails(capsys, ["profile", ENZYME], status=130)
    assert line == "treeflux: interrupted"
    assert out == ""


def test_internal_error_is_one_line_status_1(capsys, monkeypatch):
    _patch_handler(monkeypatch, _boom(ZeroDivisionError("division by zero\nsecond line")))
    monkeypatch.delenv("TREEFLUX_DEBUG", raising=False)
    line, out = fails(capsys, ["profile", ENZYME], status=1)
    assert "internal error: ZeroDivisionError: division by zero second line" in line
    assert "TREEFLUX_DEBUG=1" in line and out == ""


def test_debug_shows_the_traceback(monkeypatch):
    _patch_handler(monkeypatch, _boom(ZeroDivisionError("bug")))
    monkeypatch.setenv("TREEFLUX_DEBUG", "1")
    with pytest.raises(ZeroDivisionError):
        main(["profile", str(ENZYME)])


def test_terminal_escapes_in_messages_are_shown_not_obeyed(capsys, monkeypatch):
    from treeflux.runtime.errors import EvaluationError
    _patch_handler(monkeypatch, _boom(EvaluationError("bad \x1b[31mred\x1b[0m name")))
    line, _ = fails(capsys, ["profile", ENZYME])
    assert "\x1b" not in line and "\\x1b[31mred" in line


def test_memory_error_is_one_line(capsys, monkeypatch):
    _patch_handler(monkeypatch, _boom(MemoryError()))
    line, _ = fails(capsys, ["profile", ENZYME])
    assert "out of memory" in line


# ------------------------------------------------------------------ compilers, pipes

def test_failing_c_compiler_named_with_its_first_error_line(tmp_path):
    fake = tmp_path / "fakecc"
    fake.write_text("#!/bin/sh\necho 'fatal error: no room on this disk' >&2\necho second >&2\nexit 1\n")
    fake.chmod(0o755)
    r = run(["eval", ENZYME, "--backend", "c"],
            env={"CC": str(fake), "TREEFLUX_CACHE_DIR": str(tmp_path / "cache")})
    assert r.returncode == 2, r.stderr
    lines = r.stderr.splitlines()
    assert len(lines) == 1 and "fatal error: no room on this disk" in lines[0]
    assert str(fake) in lines[0] and "second" not in lines[0]
    assert r.stdout == ""


def test_missing_c_compiler_is_named(tmp_path):
    missing = tmp_path / "no-such-cc"
    r = run(["eval", ENZYME, "--backend", "c"],
            env={"CC": str(missing), "TREEFLUX_CACHE_DIR": str(tmp_path / "cache")})
    assert r.returncode == 2
    lines = r.stderr.splitlines()
    assert len(lines) == 1 and str(missing) in lines[0]


def test_closed_pipe_ends_quietly(tmp_path):
    # `treeflux sample ... | head -1`: the reader goes away before the rows are written.
    code = ("import sys; from treeflux.compiler.cli import main; sys.exit(main())")
    env = dict(os.environ, TREEFLUX_CACHE_DIR=str(tmp_path / "cache"))
    proc = subprocess.Popen([sys.executable, "-c", code, "sample", str(ENZYME), "--n", "20000"],
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, env=env)
    proc.stdout.readline()
    proc.stdout.close()
    err = proc.stderr.read().decode()
    proc.wait(timeout=300)
    assert err == ""
    assert proc.returncode == 1


# ------------------------------------------------------------------ progress switch

@pytest.mark.parametrize("flag", ["--quiet", "--json"])
def test_quiet_and_json_turn_progress_off(capsys, flag):
    progress.set_enabled(True)
    try:
        assert main(["profile", str(ENZYME), flag]) == 0
        assert progress._ENABLED is False
    finally:
        progress.set_enabled(True)
    capsys.readouterr()


@pytest.mark.parametrize("command", ["compile", "eval", "profile", "formula", "response", "sample",
                                     "fit", "thermo", "passage"])
def test_every_long_command_takes_quiet(command):
    parser = cli.build_parser()
    sub = next(a for a in parser._subparsers._group_actions).choices[command]
    assert any("--quiet" in a.option_strings for a in sub._actions)
