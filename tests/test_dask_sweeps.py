"""Parameter sweeps on a real Dask cluster: same table as a local run, bit for
bit; a worker killed mid-run loses nothing; Ctrl-C closes the cluster and
writes nothing; summaries keep unsaturated curves apart; CSV output is safe
to open in a spreadsheet."""

import csv
import io
import math
import os
import signal
import subprocess
import sys
import threading
import time
from contextlib import contextmanager
from pathlib import Path

import numpy as np
import psutil
import pytest

from treeflux.compiler import Scheme, compile_scheme, load
from treeflux.compiler.cli import main
from treeflux.runtime import sampling
from treeflux.runtime.errors import EvaluationError
from treeflux.runtime.safe_io import OutputError
from treeflux.runtime.sampling import sample, summarize, write_csv, write_table

dd = pytest.importorskip("dask.distributed")  # the test extra installs it; CI runs these

ROOT = Path(__file__).resolve().parent.parent
PROMOTER = ROOT / "examples" / "promoter_two_activators.toml"
RESPONSE = {"observable": "polymerase_bound", "input": "c", "lo": 1e-2, "hi": 1e4, "points": 41}


@pytest.fixture(scope="module")
def client():
    # two single-threaded worker processes with this process's BLAS and malloc
    # settings (what `sample(workers=2)` starts; see sampling._UNSET_WORKER_ENV)
    cluster = sampling._new_cluster(2)
    c = dd.Client(cluster)
    yield c
    c.close()
    cluster.close()


@pytest.fixture(scope="module")
def promoter():
    return compile_scheme(load(PROMOTER), backend="python")


def binding(name="binding"):
    """Single-site binding c/(K + c), K = koff/kon over eight decades."""
    s = Scheme(name=name)
    s.add_parameter("kon", min=0.01, max=100.0)
    s.add_parameter("koff", min=0.01, max=100.0)
    s.add_input("c", value=1.0)
    s.add_edge("R", "RL", "kon*c")
    s.add_edge("RL", "R", "koff")
    s.add_observable("bound", {"RL": 1.0})
    return s


def same(a, b):
    assert a["columns"] == b["columns"]
    assert a["data"].shape == b["data"].shape
    assert np.array_equal(a["data"], b["data"], equal_nan=True)


# ------------------------------------------------------------------ blocks

def test_blocks_cut_one_random_stream():
    # numpy's PCG64 stream split by advance() gives the rows of one draw
    sw = sampling.Sweep(seed=42, base=np.ones(3), columns=(0, 2),
                        logs=np.log([[0.1, 10.0], [1.0, 100.0]]), task=None)
    whole = np.random.default_rng(42).random((1000, 2))
    cut = np.vstack([sampling.draws(sw, a, min(1000, a + 77)) for a in range(0, 1000, 77)])
    lo, hi = sw.logs[:, 0], sw.logs[:, 1]
    assert np.array_equal(cut, np.exp(lo + whole * (hi - lo)))


def test_blocks_are_sized_by_work_and_memory(promoter):
    steady = sampling.block_rows(promoter, None, 18)
    curves = sampling.block_rows(promoter, RESPONSE, 17)
    assert steady * 18 <= sampling.BLOCK_FLOATS and steady > 50_000
    assert curves * (41 + sampling.RESPONSE_EXTRA_EVALS) <= sampling.EVALS_PER_BLOCK
    assert curves * 41 * 8 <= sampling.BLOCK_FLOATS and curves > 1000


# ------------------------------------------------------------------ cluster = local

def test_cluster_table_equals_local_table(client, promoter, monkeypatch):
    monkeypatch.setattr(sampling, "EVALS_PER_BLOCK", 20_000)          # many blocks
    local = sample(promoter, 3000, seed=5, response=RESPONSE)
    remote = sample(promoter, 3000, seed=5, response=RESPONSE, client=client)
    same(local, remote)
    assert local["data"].shape[0] // local["blocks"] >= 40
    local = sample(promoter, 50_001, seed=6)
    remote = sample(promoter, 50_001, seed=6, client=client)
    same(local, remote)
    # the rows are the model's: re-evaluate a few in this process
    cols = local["columns"]
    X = {k: local["data"][:5, cols.index(k)] for k in local["ranges"]}
    P = promoter.steady_state(X)
    assert np.array_equal(remote["data"][:5, cols.index("p_empty"):cols.index("p_empty") + 8], P)


def test_each_worker_rebuilds_a_model_once(client, monkeypatch):
    m = compile_scheme(binding("rebuilt once per worker"), backend="llvm")
    monkeypatch.setattr(sampling, "EVALS_PER_BLOCK", 2_000)
    r = sample(m, 40_000, seed=1, client=client)
    assert len(r["data"]) // r["blocks"] >= 10

    def rebuilt(name="rebuilt once per worker"):
        from treeflux.compiler import pipeline
        return sum(model.info.name == name for model in pipeline._REBUILT.values())

    counts = client.run(rebuilt)
    assert set(counts.values()) <= {0, 1} and sum(counts.values()) >= 1


def spawned_workers(parent) -> list:
    """Worker processes started from ``parent`` (multiprocessing's own resource
    tracker, which lives as long as its parent, is not one; short-lived helper
    processes may vanish while we look)."""
    found = []
    for p in parent.children(recursive=True):
        try:
            cmd = " ".join(p.cmdline())
            forked = "forkserver" in cmd and "forkserver" in " ".join(p.parent().cmdline())
            if "spawn_main" in cmd or forked:        # spawned, or forked by the fork server
                found.append(p)
        except (psutil.Error, AttributeError):
            pass
    return found


def worker_processes() -> set:
    return {p.pid for p in spawned_workers(psutil.Process())}


def test_workers_start_and_stop_a_local_cluster(promoter, monkeypatch):
    before = worker_processes()
    monkeypatch.setattr(sampling, "EVALS_PER_BLOCK", 1_000)     # 2,000 blocks: some run on the cluster
    r = sample(promoter, 2000, seed=3, workers=2)
    same(r, sample(promoter, 2000, seed=3))
    time.sleep(0.5)
    assert worker_processes() - before == set()


def test_scheduler_address_from_the_command_line(client, promoter, tmp_path, capsys):
    out = tmp_path / "s.csv"
    address = client.scheduler.address
    assert main(["sample", str(PROMOTER), "--n", "1e3", "--seed", "9", "--scheduler", address,
                 "--out", str(out)]) == 0
    assert "wrote 1000 samples" in capsys.readouterr().out
    back = np.loadtxt(out, delimiter=",", skiprows=1)
    assert np.array_equal(back, sample(promoter, 1000, seed=9)["data"])  # %.17g round-trips


def test_unreachable_scheduler_is_one_line(promoter, monkeypatch):
    monkeypatch.setattr(sampling, "CONNECT_TIMEOUT", "1s")
    with pytest.raises(EvaluationError, match="cannot reach the Dask scheduler at tcp://127.0.0.1:9"):
        sample(promoter, 10, scheduler="tcp://127.0.0.1:9")


# ------------------------------------------------------------------ progress

def test_progress_counts_every_sample(client, promoter, monkeypatch):
    seen = []

    class Bar:
        def update(self, k):
            seen[-1][1].append(k)

    @contextmanager
    def recorder(desc, *, total=None, unit="it"):
        seen.append((total, []))
        yield Bar()

    monkeypatch.setattr(sampling, "progress", recorder)
    monkeypatch.setattr(sampling, "EVALS_PER_BLOCK", 30_000)
    sample(promoter, 700, seed=2, response=RESPONSE)
    sample(promoter, 700, seed=2, response=RESPONSE, client=client)
    for total, steps in seen:
        assert total == 700 and sum(steps) == 700 and len(steps) == math.ceil(700 / 93)


# ------------------------------------------------------------------ refusals

def test_requests_beyond_memory_are_refused_up_front(promoter):
    with pytest.raises(EvaluationError, match=r"10,000,000,000 samples need about .* MiB"):
        sample(promoter, 10 ** 10)
    too_many = sampling.available_memory() // sampling.WORKER_BYTES + 1
    with pytest.raises(EvaluationError, match=f"{too_many} worker processes need about"):
        sample(promoter, 10, workers=too_many)
    with pytest.raises(EvaluationError, match="seed must be a non-negative integer"):
        sample(promoter, 10, seed=-1)
    with pytest.raises(EvaluationError, match="give one of workers, client or scheduler"):
        sample(promoter, 10, workers=2, scheduler="tcp://127.0.0.1:9")


# ------------------------------------------------------------------ unsaturated curves

def test_summaries_exclude_curves_that_did_not_saturate(tmp_path, monkeypatch):
    m = compile_scheme(binding())
    # K = koff/kon spans [1e-4, 1e4]; over [1e-3, 1e3] many curves are cut by the range
    r = sample(m, 400, seed=4, response={"observable": "bound", "input": "c", "lo": 1e-3, "hi": 1e3})
    d, cols = r["data"], r["columns"]
    sat = d[:, cols.index("saturated")] == 1
    stats = summarize(r)
    assert stats["curves"]["saturated"] == sat.sum() > 20
    assert stats["curves"]["unsaturated"] == (~sat).sum() > 20 and stats["curves"]["flat"] == 0
    hill = d[:, cols.index("hill_effective")]
    assert stats["columns"]["hill_effective"]["max"] == hill[sat].max()
    assert stats["columns"]["hill_effective"]["count"] == sat.sum()
    # the cut curves are the ones that would have set the maximum
    assert hill[~sat].max() > hill[sat].max()
    # a saturated single-site curve has its half-point K = koff/kon (exact) inside the range
    K = d[:, cols.index("koff")] / d[:, cols.index("kon")]
    assert np.all((K[sat] > 1e-3) & (K[sat] < 1e3))
    assert not sat[(K < 1e-3) | (K > 1e3)].any()
    # parameters are summarized over every sample
    assert stats["columns"]["kon"]["count"] == 400
    # the plot draws them apart
    from treeflux.compiler import cli_analysis
    plt = cli_analysis._pyplot()
    figures = []
    monkeypatch.setattr(plt, "close", figures.append)
    cli_analysis._plot_samples(plt, r, tmp_path / "s.png")
    labels = [c.get_label() for c in figures[0].axes[0].collections]
    assert any(f"saturated within the range ({sat.sum()})" in x for x in labels)
    assert any(f"not saturated" in x and f"({(~sat).sum()})" in x for x in labels)
    assert (tmp_path / "s.png").read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"  # PNG signature (ISO/IEC 15948)


def test_sample_text_and_json_report_unsaturated_counts(tmp_path, capsys):
    path = tmp_path / "binding.toml"
    path.write_text('name = "binding"\n[parameters]\nkon = { min = 0.01, max = 100.0 }\n'
                    'koff = { min = 0.01, max = 100.0 }\n[inputs]\nc = { value = 1.0 }\n'
                    '[[edges]]\nsource = "R"\ntarget = "RL"\nrate = "kon*c"\n'
                    '[[edges]]\nsource = "RL"\ntarget = "R"\nrate = "koff"\n'
                    '[observables]\nbound = { "RL" = 1.0 }\n')
    args = ["sample", str(path), "--n", "300", "--observable", "bound", "--input", "c",
            "--range", "1e-3:1e3"]
    assert main(args + ["--out", str(tmp_path / "t.csv")]) == 0
    text = capsys.readouterr().out
    r = sample(compile_scheme(load(path)), 300, seed=0,
               response={"observable": "bound", "input": "c", "lo": 1e-3, "hi": 1e3})
    c = summarize(r)["curves"]
    assert f"{c['saturated']} curves saturated within the range, {c['unsaturated']} did not" in text
    assert main(args + ["--json"]) == 0
    import json
    j = json.loads(capsys.readouterr().out)
    assert j["curves"]["unsaturated"] == c["unsaturated"]
    assert j["summary"]["hill_effective"]["count"] == c["saturated"]


# ------------------------------------------------------------------ CSV safety

def test_csv_quotes_names_and_neutralises_formulas(tmp_path):
    cols = ["k,1", 'say "x"', "=HYPERLINK(\"http://x\")", "+1", "-2", "@SUM(A1)", "plain"]
    data = np.array([[-1.5, 2.0, float("nan"), float("inf"), float("-inf"), 1e-300, -0.0]])
    result = {"columns": cols, "data": data}
    buf = io.StringIO()
    write_csv(result, buf)
    rows = list(csv.reader(io.StringIO(buf.getvalue())))
    # RFC 4180 quoting round-trips the names; formula-looking text cells get a
    # leading apostrophe (common practice against spreadsheet formula injection)
    assert rows[0] == ["k,1", 'say "x"', "'=HYPERLINK(\"http://x\")", "'+1", "'-2", "'@SUM(A1)", "plain"]
    assert rows[1][0] == "-1.5" and rows[1][4] == "-inf"            # numbers stay numbers
    back = np.array([float(v) for v in rows[1]])
    assert np.array_equal(back, data[0], equal_nan=True)
    assert str(write_table(result, tmp_path / "t.csv")) == str(tmp_path / "t.csv")
    assert (tmp_path / "t.csv").read_text() == buf.getvalue()
    (tmp_path / "elsewhere").write_text("keep")
    (tmp_path / "link.csv").symlink_to(tmp_path / "elsewhere")
    with pytest.raises(OutputError, match="symbolic link"):
        write_table(result, tmp_path / "link.csv")
    assert (tmp_path / "elsewhere").read_text() == "keep"
    assert sorted(p.name for p in tmp_path.iterdir()) == ["elsewhere", "link.csv", "t.csv"]


# ------------------------------------------------------------------ Ctrl-C

def sigint_ignored(p) -> bool:
    """Whether SIGINT (signal 2, bit 1 of the mask) is ignored by a process (Linux /proc)."""
    pid = p if isinstance(p, int) else p.pid
    with open(f"/proc/{pid}/status") as fh:
        mask = next(int(line.split()[1], 16) for line in fh if line.startswith("SigIgn:"))
    return bool(mask & (1 << (signal.SIGINT - 1)))


def test_ctrl_c_stops_the_sweep_closes_the_cluster_and_writes_nothing(tmp_path):
    out = tmp_path / "never.csv"
    env = dict(os.environ, PYTHONUNBUFFERED="1")
    cmd = [sys.executable, "-c", "import sys; from treeflux.compiler.cli import main; sys.exit(main())",
           "sample", str(PROMOTER), "--n", "200000", "--workers", "2", "--observable",
           "polymerase_bound", "--input", "c", "--range", "1e-2:1e4", "--out", str(out)]
    proc = subprocess.Popen(cmd, stdout=subprocess.PIPE, stderr=subprocess.PIPE, env=env,
                            start_new_session=True)
    try:
        interrupt_when_running(proc, out, tmp_path)
    finally:
        if proc.poll() is None:
            os.killpg(proc.pid, signal.SIGKILL)
            proc.wait()


def interrupt_when_running(proc, out, tmp_path):
    parent = psutil.Process(proc.pid)
    deadline = time.time() + 120
    workers = []
    while time.time() < deadline:
        # started: two worker processes, and SIGINT no longer ignored by the command
        # (it ignores SIGINT while the workers start, so that they inherit that)
        time.sleep(0.3)
        workers = spawned_workers(parent)
        try:
            if len(workers) >= 2 and not sigint_ignored(proc.pid) and all(map(sigint_ignored, workers)):
                break
        except OSError:            # a process went away while we read its status
            continue
    assert len(workers) >= 2, "the local cluster did not start"
    family = parent.children(recursive=True)
    time.sleep(1.0)                        # the sweep runs (it takes ~10 s on two free cores)
    os.killpg(proc.pid, signal.SIGINT)     # what a terminal sends on Ctrl-C: the whole group
    _, err = proc.communicate(timeout=60)
    lines = err.decode().strip().splitlines()
    assert proc.returncode == 130, err.decode()[-3000:]
    assert lines == ["treeflux: interrupted; nothing was written"], lines
    assert not out.exists() and list(tmp_path.iterdir()) == []
    time.sleep(1.0)
    assert [p.pid for p in family if p.is_running() and p.status() != psutil.STATUS_ZOMBIE] == []


# ------------------------------------------------------------------ a worker dies

def test_killed_worker_loses_no_samples(client, promoter, monkeypatch):
    """Kill one of two worker processes while it runs a block: the scheduler
    runs its blocks again elsewhere and the table equals the local one."""
    monkeypatch.setattr(sampling, "EVALS_PER_BLOCK", 250_000)   # ~0.1 s blocks, ~30 of them
    n = 24_000
    local = sample(promoter, n, seed=8, response=RESPONSE)
    assert n // local["blocks"] >= 25
    pids = client.run(os.getpid)
    victim = sorted(pids)[0]
    killed = {}

    def killer():
        t_end = time.time() + 60
        while time.time() < t_end:
            if client.processing(workers=[victim]).get(victim):
                time.sleep(0.3)
                os.kill(pids[victim], signal.SIGKILL)
                killed["at"] = time.time()
                return
            time.sleep(0.02)

    thread = threading.Thread(target=killer)
    thread.start()
    remote = sample(promoter, n, seed=8, response=RESPONSE, client=client)
    finished = time.time()
    thread.join()
    assert "at" in killed and killed["at"] < finished          # killed mid-run
    assert not psutil.pid_exists(pids[victim]) or \
        psutil.Process(pids[victim]).status() == psutil.STATUS_ZOMBIE
    assert victim not in client.scheduler_info()["workers"]
    same(local, remote)
