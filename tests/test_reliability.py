"""Reliability (issue 16): one test group per defect class found by
adversarial testing.

1. no wrong number reported as fact (ill-conditioned pinned loops);
2. readers never block on a pipe nor read a device without end;
3. worker processes never outlive their parent (real signals, real sweeps);
4. no traceback from the inputs that used to give one;
5. work bounded before it starts (memory refusal, --force, progress);
6. names cannot drive the terminal;
7. every option checked, outputs checked before any computing.
"""

from __future__ import annotations

import contextlib
import io
import json
import os
import signal
import subprocess
import sys
import threading
import time
from pathlib import Path

import numpy as np
import pytest
import scipy.linalg

from hierarchy.cli import main
from hierarchy.errors import HierarchyError, UnstableError
from hierarchy.spec import load_spec, parse_spec

ROOT = Path(__file__).resolve().parents[1]
SPECS = ROOT / "specs"
SINGLE = str(SPECS / "single-loop.yaml")
SINGLE_GAINS = str(SPECS / "single-loop.gains.json")


def cli(*argv):
    """``hierarchy ARGV`` in process: (status, stdout, stderr)."""
    out, err = io.StringIO(), io.StringIO()
    with contextlib.redirect_stdout(out), contextlib.redirect_stderr(err):
        try:
            status = main([str(a) for a in argv])
        except SystemExit as exc:
            status = exc.code
    return status, out.getvalue(), err.getvalue()


def one_error(status, out, err) -> str:
    assert status == 2, (status, out, err)
    assert "Traceback" not in err
    lines = [line for line in err.splitlines() if line.startswith("error:")]
    assert len(lines) == 1, err
    return err


# ---------------------------------------------------------------------------
# 1. numbers


def nonnormal_pinned_spec(seed: int) -> dict:
    """One 3-state area whose pinned M is stable (eigenvalues inside the
    unit disc) but wildly non-normal: entries up to ~1e10 above the
    diagonal. Such loops gave negative errors with exit status 0."""
    rng = np.random.default_rng(seed)
    d = 3
    M = np.triu(rng.standard_normal((d, d)) * 1e10, 1) + np.diag([0.5, -0.3, 0.2])
    return {"spec": 1, "name": "non-normal pins",
            "world": {"states": {"x": {"dim": d, "dynamics": 0.9, "noise": 0.1}}},
            "sensors": {"eye": {"observes": {"x": "identity"}, "noise": 0.1}},
            "areas": {"a": {"tracks": "x", "pin": {"M": M.tolist()}}},
            "links": [{"from": "eye", "to": "a", "kind": "residual", "noise": 0.05, "price": 0.1,
                       "pin": {"S": np.eye(d).tolist(), "K": (0.3 * np.eye(d)).tolist()}}]}


def test_ill_conditioned_pins_are_refused_not_reported(tmp_path):
    from hierarchy.loop.evaluate import evaluate

    refused = 0
    for seed in range(12):
        spec = parse_spec(json.dumps(nonnormal_pinned_spec(seed)))
        try:
            scores = evaluate(spec)
        except UnstableError as err:
            assert "too badly conditioned" in str(err)
            refused += 1
            continue
        # Whatever is reported is a possible value: mean squares are >= 0.
        assert scores.areas["a"].error >= 0 and scores.areas["a"].activity >= 0
        assert all(l.power >= 0 for l in scores.links.values())
    assert refused >= 6  # these loops are far beyond double precision


def test_ill_conditioned_pins_exit_nonzero_from_evaluate_and_design(tmp_path):
    path = tmp_path / "pins.yaml"
    path.write_text(json.dumps(nonnormal_pinned_spec(0)))
    err = one_error(*cli("evaluate", path))
    assert "too badly conditioned to evaluate" in err
    status, out, err = cli("design", path, "--no-reference", "--restarts", "1")
    assert status != 0 and "converged" not in out, out
    assert "too badly conditioned" in err


def test_check_agrees_with_scipy_lyapunov_on_a_healthy_loop():
    """The check's residual is measured against an independent solve
    (scipy.linalg.solve_discrete_lyapunov, Bartels-Stewart)."""
    from hierarchy.loop.closedloop import Layout, assemble
    from hierarchy.loop.evaluate import RESIDUAL_RTOL, _solve
    from hierarchy.loop.gains import load_gains

    spec = load_spec(SPECS / "two-level.yaml")
    gains = load_gains(SPECS / "two-level.gains.json", spec)
    layout = Layout(spec)
    loop = assemble(layout, gains)
    reference = scipy.linalg.solve_discrete_lyapunov(loop.Phi, loop.Gamma @ layout.Omega @ loop.Gamma.T)
    _, sol = _solve(layout, layout.flatten(gains))
    assert np.allclose(sol.Sigma, reference, rtol=1e-9, atol=1e-12)
    residual = sol.Sigma - loop.Phi @ sol.Sigma @ loop.Phi.T - loop.Gamma @ layout.Omega @ loop.Gamma.T
    assert np.linalg.norm(residual) < RESIDUAL_RTOL * 1e-3 * np.linalg.norm(sol.Sigma)


def test_simulation_intervals_hold_no_negative_value():
    from hierarchy.loop.simulate import _interval

    # Batch means of a mean square that is nearly always 0 (a link that
    # almost never sends): the symmetric t interval reaches below 0, a value
    # no mean square can take.
    means = np.array([0.0] * 39 + [1.0])
    est = _interval(means, 0.99)
    assert est.low == 0.0 and est.high > est.mean > 0
    assert not est.contains(-1e-6)


def test_simulate_refuses_when_the_exact_values_cannot_be_trusted(tmp_path):
    path = tmp_path / "pins.yaml"
    path.write_text(json.dumps(nonnormal_pinned_spec(0)))
    err = one_error(*cli("simulate", path, "--steps", "200", "--chains", "2"))
    assert "too badly conditioned" in err or "overflow" in err


# ---------------------------------------------------------------------------
# 2. readers


def _readers(tmp_path):
    """Every reader of a user file, as functions of a path."""
    from hierarchy.loop.gains import load_gains
    from hierarchy.report.drawing import read_result
    from hierarchy.studies.runner import _load_part

    spec = load_spec(SINGLE)

    def part(path):
        folder = Path(path).parent
        key = Path(path).stem
        assert _load_part(folder, key) is None  # not a usable part: designed again
        raise HierarchyError("ignored part")

    return {"spec": load_spec, "gains": lambda p: load_gains(p, spec), "result": read_result, "part": part}


def _within(seconds, fn, *args):
    """``fn(*args)`` in a thread; fail if it has not returned in time."""
    box = {}

    def run():
        try:
            box["value"] = fn(*args)
        except BaseException as exc:  # noqa: BLE001 - inspected below
            box["error"] = exc

    t = threading.Thread(target=run, daemon=True)
    t.start()
    t.join(seconds)
    assert not t.is_alive(), f"{fn} blocked for more than {seconds} s"
    return box


@pytest.mark.parametrize("reader", ["spec", "gains", "result", "part"])
def test_named_pipe_is_refused_without_blocking(tmp_path, reader):
    fifo = tmp_path / "pipe.json"
    os.mkfifo(fifo)
    box = _within(5, _readers(tmp_path)[reader], str(fifo))
    assert isinstance(box.get("error"), HierarchyError), box
    if reader != "part":
        assert "named pipe" in str(box["error"])


@pytest.mark.parametrize("reader", ["spec", "gains", "result", "part"])
@pytest.mark.parametrize("device", ["/dev/zero", "/dev/urandom"])
def test_device_is_refused_before_any_read(tmp_path, reader, device):
    if not os.path.exists(device):
        pytest.skip(f"no {device}")
    link = tmp_path / "device.json"
    link.symlink_to(device)  # a symlink hides the device behind a file name
    box = _within(5, _readers(tmp_path)[reader], str(link))
    assert isinstance(box.get("error"), HierarchyError), box
    if reader != "part":
        assert "character device" in str(box["error"])


def test_read_limit_holds_whatever_the_reported_size(tmp_path, monkeypatch):
    from hierarchy import io as hio

    big = tmp_path / "big.yaml"
    big.write_bytes(b"#" * 5000)
    with pytest.raises(hio.ReadRefused, match="larger than 4,999 bytes"):
        hio.read_bytes(big, 4999)
    assert hio.read_bytes(big, 5000) == b"#" * 5000

    # A file that reports size 0 but has content (as /proc files do) is
    # still cut at the limit: the loop counts what it read.
    real_fstat = os.fstat
    monkeypatch.setattr(hio.os, "fstat", lambda fd: os.stat_result((*real_fstat(fd)[:6], 0, *real_fstat(fd)[7:])))
    with pytest.raises(hio.ReadRefused, match="larger than"):
        hio.read_bytes(big, 100)


def test_trailing_slash_on_an_input_file_is_refused():
    err = one_error(*cli("check", SINGLE + "/"))
    assert "cannot end with '/'" in err
    with pytest.raises(HierarchyError, match="not a folder"):
        load_spec(SINGLE + "/")


# ---------------------------------------------------------------------------
# 3. workers and signals (real sweeps, real signals)

SWEEP = [sys.executable, "-m", "hierarchy", "sweep", str(SPECS / "two-level.yaml"), "links[probe->station-view].price",
         "--from", "0.01", "--to", "1", "--points", "400", "--workers", "2", "--no-plot", "--no-progress",
         "--restarts", "1", "--max-iter", "200"]


def _finished(parts: Path) -> list:
    """Finished point files (not the hidden temporary file of one being written)."""
    return [p for p in parts.glob("*.json") if not p.name.startswith(".")]


def _sweep_then(tmp_path, sig):
    """Start a 2-worker sweep, wait until its workers run and a point is
    finished, send ``sig`` to the parent; return (status, stderr, the
    parent's descendants, parts folder)."""
    psutil = pytest.importorskip("psutil")
    base = tmp_path / "run"
    err_file = open(tmp_path / "stderr.txt", "w+")
    env = dict(os.environ, PYTHONPATH=str(ROOT) + os.pathsep + os.environ.get("PYTHONPATH", ""))
    proc = subprocess.Popen(SWEEP + ["--out", str(base)], stdout=subprocess.DEVNULL, stderr=err_file, env=env,
                            cwd=tmp_path)
    parts = Path(f"{base}.parts")
    try:
        deadline = time.monotonic() + 120
        while time.monotonic() < deadline:
            kids = psutil.Process(proc.pid).children(recursive=True)
            if len(kids) >= 3 and parts.is_dir() and _finished(parts):
                break
            assert proc.poll() is None, "the sweep ended before it could be signalled"
            time.sleep(0.1)
        else:
            pytest.fail("the sweep never started its workers")
        kids = psutil.Process(proc.pid).children(recursive=True)
        os.kill(proc.pid, sig)
        status = proc.wait(timeout=60)
        # Every descendant (the workers, the start method's server) is gone soon.
        _, alive = psutil.wait_procs(kids, timeout=10)
        assert not alive, f"still alive 10 s after the parent: {[p.cmdline() for p in alive]}"
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.wait()
    err_file.seek(0)
    return status, err_file.read(), parts


@pytest.mark.parametrize("sig", ["SIGTERM", "SIGHUP"])
def test_sigterm_and_sighup_stop_a_sweep_like_ctrl_c(tmp_path, sig):
    number = getattr(signal, sig)
    status, err, parts = _sweep_then(tmp_path, number)
    assert status == 128 + number, err  # as a shell reports a signalled command
    assert "Traceback" not in err
    assert err.count(f"interrupted ({sig}) during `sweep`") == 1, err
    assert "run the same command again to resume" in err
    kept = _finished(parts)
    assert kept and all(json.loads(p.read_text())["format"] for p in kept)


def test_workers_die_with_a_killed_parent(tmp_path):
    status, err, parts = _sweep_then(tmp_path, signal.SIGKILL)
    assert status == -signal.SIGKILL
    assert _finished(parts)


def test_a_worker_killed_alone_is_a_message(monkeypatch, tmp_path):
    """A worker that dies (the kernel's OOM killer, say) used to surface as a
    BrokenProcessPool traceback."""
    import concurrent.futures as cf

    from hierarchy import studies

    class Broken(cf.Executor):
        def submit(self, fn, *args, **kwargs):
            fut = cf.Future()
            fut.set_exception(cf.BrokenExecutor("a child process terminated abruptly"))
            return fut

    monkeypatch.setattr(studies.runner, "_Inline", Broken)
    err = one_error(*cli("sweep", SINGLE, "links[thermometer->estimate].price", "--from", "0.1", "--to", "1",
                         "--points", "2", "--workers", "1", "--no-plot", "--out", tmp_path / "s"))
    assert "a worker process ended without finishing its point" in err


def test_worker_watchdog_sees_a_zombie_as_dead():
    from hierarchy.studies.runner import _alive

    child = subprocess.Popen([sys.executable, "-c", "pass"])
    deadline = time.monotonic() + 10
    while _alive(child.pid) and time.monotonic() < deadline:  # not reaped yet: a zombie
        time.sleep(0.05)
    assert not _alive(child.pid)
    child.wait()
    assert _alive(os.getpid())


# ---------------------------------------------------------------------------
# 4. inputs that gave tracebacks


def test_render_of_a_deeply_nested_json(tmp_path):
    path = tmp_path / "deep.json"
    path.write_text("[" * 200_000 + "]" * 200_000)
    err = one_error(*cli("render", path, "-o", tmp_path / "x.png"))
    assert "nested too deeply" in err


def test_render_of_a_result_without_sensors(tmp_path):
    result = tmp_path / "r.json"
    assert cli("design", SINGLE, "--json", result, "--restarts", "1")[0] == 0
    data = json.loads(result.read_text())
    link = data["links"]["thermometer->estimate"]
    data["links"] = {"estimate->copy": link}
    data["areas"]["copy"] = data["areas"]["estimate"]
    result.write_text(json.dumps(data))
    status, out, err = cli("render", result, "-o", tmp_path / "x.png")
    assert status == 0, err
    assert (tmp_path / "x.png").stat().st_size > 1000


@pytest.mark.parametrize("argv,place", [
    (("simulate", SINGLE, "--gains", SINGLE_GAINS, "--seed", "-1"), "--seed"),
    (("design", SINGLE, "--seed", "-5"), "--seed"),
    (("simulate", SINGLE, "--gains", SINGLE_GAINS, "--chains", "10000000000"), "--chains"),
    (("generate", "--areas", "4", "--levels", "2", "--area-dim", "1000000000", "-o", "g.yaml"), "--area-dim"),
    (("generate", "--areas", "4", "--levels", "2", "--world-dim", "100000000", "-o", "g.yaml"), "--world-dim"),
])
def test_former_tracebacks_are_one_message(argv, place, tmp_path, monkeypatch):
    monkeypatch.chdir(tmp_path)
    err = one_error(*cli(*argv))
    assert f"error: {place}" in err


def test_generated_circuit_beyond_the_spec_limits_is_not_written(tmp_path):
    out = tmp_path / "g.yaml"
    err = one_error(*cli("generate", "--areas", "40", "--levels", "4", "--area-dim", "4", "--density", "0.3",
                         "-o", out))
    assert "not a valid spec" in err and "nothing was written" in err
    assert not out.exists()


def test_running_out_of_memory_is_a_message(monkeypatch, tmp_path):
    from hierarchy import circuit

    def exhausted(self, *args, **kwargs):
        raise MemoryError

    monkeypatch.setattr(circuit.Circuit, "design", exhausted)
    status, out, err = cli("design", SINGLE, "--json", tmp_path / "r.json")
    assert status == 1 and "Traceback" not in err
    assert "ran out of memory" in err and "no file was written" in err
    assert not (tmp_path / "r.json").exists()


# ---------------------------------------------------------------------------
# 5. work bounded before it starts


def test_design_beyond_the_machines_memory_is_refused(monkeypatch):
    from hierarchy import resources

    monkeypatch.setattr(resources, "available_memory", lambda: 50e6)
    err = one_error(*cli("design", SINGLE))
    assert "but only 50 MB is available" in err and "--force" in err
    status, out, err = cli("design", SINGLE, "--force", "--restarts", "1")
    assert status == 0 and "converged" in out, err


def test_memory_estimate_is_an_upper_bound_of_a_real_evaluation():
    """Peak memory of one evaluation measured with tracemalloc (numpy
    reports its buffers to it) stays below the estimate."""
    import tracemalloc

    from hierarchy.spec.generate import generate_spec_text
    from hierarchy.design.problem import Problem
    from hierarchy.resources import BASE_BYTES, estimate

    spec = parse_spec(generate_spec_text(areas=6, levels=3, density=0.3, seed=1, area_dim=8))
    tracemalloc.start()
    try:
        prob = Problem(spec)
        prob.value_and_grad(prob.pack(prob.informed_start()))
        peak = tracemalloc.get_traced_memory()[1]
    finally:
        tracemalloc.stop()
    need = estimate(spec)
    assert peak < need.memory - BASE_BYTES
    assert need.memory - BASE_BYTES < 50 * peak  # an estimate, not a blanket


def test_progress_lines_for_a_long_design(monkeypatch):
    from hierarchy.cli import commands

    monkeypatch.setattr(commands, "PROGRESS_SECONDS", 0.005)
    status, out, err = cli("design", SPECS / "two-level.yaml", "--progress", "--restarts", "2")
    assert status == 0
    lines = [l for l in err.splitlines() if l.startswith("design: ")]
    assert lines and lines[-1].endswith("s so far")
    counts = [int(l.split()[1]) for l in lines]
    assert counts == sorted(counts) and counts[-1] > 0
    # Not on a pipe unless asked for.
    assert "design: " not in cli("design", SINGLE, "--restarts", "1")[2]


# ---------------------------------------------------------------------------
# 6. names on the terminal

HOSTILE = "v1\x1b]0;owned\x07\x1b[2J\u202eevil\r"


def test_escape_sequences_in_names_are_shown_not_obeyed(tmp_path):
    text = (SPECS / "single-loop.yaml").read_text().replace("greenhouse thermometer loop", json.dumps(HOSTILE)[1:-1])
    text = text.replace("name: ", 'name: "', 1).replace("\nworld:", '"\nworld:', 1)
    path = tmp_path / "hostile.yaml"
    path.write_text(text)
    assert load_spec(path).name == HOSTILE
    for argv in (("check", path), ("design", path, "--restarts", "1")):
        status, out, err = cli(*argv)
        assert status == 0, err
        for stream in (out, err):
            assert "\x1b" not in stream and "\u202e" not in stream and "\r" not in stream and "\x07" not in stream
        assert "\\x1b]0;owned\\x07\\x1b[2J\\u202eevil\\r" in out


def test_escape_sequences_in_a_budget_name(tmp_path):
    spec = {"spec": 1, "name": "b", "world": {"states": {"x": {"dynamics": 0.9, "noise": 0.1}}},
            "sensors": {"eye": {"observes": {"x": 1}, "noise": 0.1}},
            "areas": {"v1": {"tracks": "x"}},
            "links": [{"from": "eye", "to": "v1", "kind": "residual", "noise": 0.05}],
            "budgets": [{"name": "\x1b[31mred", "links": ["eye->v1"], "total": 0.5}]}
    path = tmp_path / "b.yaml"
    path.write_text(json.dumps(spec))
    status, out, err = cli("check", path)
    assert status == 0, err
    assert "\x1b" not in out and "budget \\x1b[31mred" in out


# ---------------------------------------------------------------------------
# 7. options and outputs

STUDY = ("sweep", SINGLE, "links[thermometer->estimate].price", "--from", "0.1", "--to", "1", "--points", "2",
         "--no-plot")
COMPARE = ("compare", str(SPECS / "compare-flat.yaml"), str(SPECS / "compare-deep.yaml"), "--budgets", "0.1:1:2",
           "--no-plot")


@pytest.mark.parametrize("argv,place", [
    (STUDY + ("--workers", "0"), "--workers"),
    (STUDY + ("--workers", "-3"), "--workers"),
    (("compare", str(SPECS / "compare-flat.yaml"), "--budgets", "0.1:1:2"), "SPEC"),
    (COMPARE + ("--tie", "nan"), "--tie"),
    (COMPARE + ("--tie=-1e-5",), "--tie"),
    (COMPARE + ("--tie", "inf"), "--tie"),
    (("design", SINGLE, "--max-iter", "0"), "--max-iter"),
    (("design", SINGLE, "--max-iter", "-1"), "--max-iter"),
    (("design", SINGLE, "--restarts", "0"), "--restarts"),
    (STUDY[:4] + ("1e13", "--to", "1", "--no-plot"), "--from"),
    (STUDY[:5] + ("--to=-2e12", "--no-plot"), "--to"),
    (("phase", SINGLE, "--x", "links[thermometer->estimate].price", "--x-range", "0.1:1e15:2",
      "--y", "links[estimate->thermometer].price", "--y-range", "0.1:1:2"), "--x-range"),
    (("compare", str(SPECS / "compare-flat.yaml"), str(SPECS / "compare-deep.yaml"), "--budgets", "1:inf:3"),
     "--budgets"),
    (("evaluate", SINGLE, "--gains", SINGLE_GAINS, "--json", ""), "--json"),
    (("design", SINGLE, "--gains", ""), "--gains"),
    (STUDY + ("--out", ""), "--out"),
    (("simulate", SINGLE, "--gains", SINGLE_GAINS, "--level", "1.5"), "--level"),
    (("simulate", SINGLE, "--gains", SINGLE_GAINS, "--chains", "500", "--steps", "10000000"), "--steps/--chains"),
    (("evaluate", SINGLE, "--gains", SINGLE_GAINS + "/"), "--gains"),
    (("design", SINGLE, "--start", SINGLE_GAINS + "/"), "--start"),
])
def test_bad_option_is_a_usage_message(argv, place):
    err = one_error(*cli(*argv))
    assert f"error: {place}:" in err and "fix:" in err


@pytest.fixture
def no_computing(monkeypatch):
    """Any design, evaluation or simulation fails the test: the outputs must
    be refused before."""
    from hierarchy import circuit, studies
    from hierarchy.loop import evaluate
    from hierarchy.loop import simulate

    def boom(*args, **kwargs):
        raise AssertionError("computed before the output path was checked")

    monkeypatch.setattr(circuit.Circuit, "design", boom)
    monkeypatch.setattr(evaluate, "evaluate", boom)
    monkeypatch.setattr(simulate, "simulate", boom)
    monkeypatch.setattr(studies.walk, "_execute", boom)


@pytest.mark.parametrize("argv", [
    ("design", SINGLE, "--json", "/missing/dir/x.json"),
    ("design", SINGLE, "--gains", "/missing/dir/x.json"),
    ("design", SINGLE, "--json", "{tmp}/"),
    ("evaluate", SINGLE, "--gains", SINGLE_GAINS, "--json", "/missing/dir/x.json"),
    ("simulate", SINGLE, "--gains", SINGLE_GAINS, "--json", "/missing/dir/x.json"),
    STUDY + ("--out", "/proc/no-such-study"),
    STUDY + ("--out", "/missing/dir/run"),
    ("render", "{result}", "-o", "/proc/x.png"),
])
def test_outputs_are_checked_before_any_computing(argv, no_computing, tmp_path):
    result = tmp_path / "r.json"
    result.write_text(json.dumps({"format": "hierarchy-result", "areas": {}, "links": {}}))
    argv = [str(a).format(tmp=tmp_path, result=result) for a in argv]
    err = one_error(*cli(*argv))
    assert "computed before" not in err


def test_write_protected_output_is_left_alone(tmp_path):
    target = tmp_path / "scores.json"
    target.write_text("keep me")
    target.chmod(0o444)
    err = one_error(*cli("evaluate", SINGLE, "--gains", SINGLE_GAINS, "--json", target))
    assert "write-protected" in err
    assert target.read_text() == "keep me"
    # The atomic writer itself refuses too (for Python callers).
    from hierarchy.io import atomic_write_text

    with pytest.raises(HierarchyError, match="write-protected"):
        atomic_write_text(target, "new")
    assert target.read_text() == "keep me"


def test_output_onto_a_device_or_pipe_is_refused(tmp_path):
    fifo = tmp_path / "out.json"
    os.mkfifo(fifo)
    err = one_error(*cli("evaluate", SINGLE, "--gains", SINGLE_GAINS, "--json", fifo))
    assert "named pipe" in err
    assert fifo.is_fifo()
