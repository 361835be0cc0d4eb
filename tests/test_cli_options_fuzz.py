"""Fuzzing every command's options (issue 16): at least 2,000 generated
command lines, run in process through :func:`hierarchy.cli.main`, and a
handful through a real subprocess.

Each command line mixes good and hostile values for every option the
command has: counts of 0, negative, huge or not numbers; NaN, inf and
values beyond 1e12; empty paths, trailing slashes, missing folders, named
pipes, devices, write-protected files; ranges that do not parse. Work is
kept small where a value is valid (a few iterations, a few points, one
worker), so the cases run quickly.

The contract (every case): exit 0, 1 (an honest failed design) or 2 with
exactly one ``error:`` line; never an uncaught exception, never a hang (an
alarm bounds every case), never a control character on the terminal.
(Method: property-based testing with Hypothesis; common practice, no source.)
"""

from __future__ import annotations

import contextlib
import io
import os
import shutil
import signal
import subprocess
import sys
import tempfile
from collections import Counter
from pathlib import Path

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from hierarchy.cli import main

ROOT = Path(__file__).resolve().parents[1]
SPECS = ROOT / "specs"
WORK = Path(tempfile.mkdtemp(prefix="hierarchy-options-fuzz-"))
#: Cases the in-process campaign must reach (the issue asks for 2,000).
CASES = 2000
#: Seconds one case may take before it counts as a hang.
LIMIT = 60


def _setup_files():
    (WORK / "pipe").exists() or os.mkfifo(WORK / "pipe")
    protected = WORK / "protected.json"
    if not protected.exists():
        protected.write_text("{}")
        protected.chmod(0o444)
    (WORK / "folder").mkdir(exist_ok=True)
    (WORK / "\x1b[31mred.yaml").write_text((SPECS / "single-loop.yaml").read_text())


_setup_files()

SPEC_IN = [str(SPECS / "single-loop.yaml")] * 4 + [
    str(SPECS / "two-level.yaml"), str(SPECS / "single-loop.yaml") + "/", "", "/", "/dev/zero", str(WORK / "pipe"),
    str(WORK / "missing.yaml"), str(WORK / "folder"), str(SPECS / "single-loop.gains.json"),
    str(WORK / "\x1b[31mred.yaml"), str(ROOT / "tests" / "adversarial" / "specs" / "pin-non-normal.yaml")]
BUDGET_SPECS = [str(SPECS / "compare-flat.yaml"), str(SPECS / "compare-deep.yaml"), str(SPECS / "two-senses.yaml")]
GAINS_IN = [str(SPECS / "single-loop.gains.json")] * 3 + [
    "", str(WORK / "pipe"), "/dev/zero", str(WORK / "missing.json"), str(SPECS / "single-loop.gains.json") + "/",
    str(ROOT / "tests" / "adversarial" / "gains" / "nan-entry.json")]
OUT = [str(WORK / "out.json"), str(WORK / "out2.json"), "", "/missing/dir/x.json", str(WORK / "folder"),
       str(WORK / "folder") + "/", str(WORK / "protected.json"), str(WORK / "pipe"), "/dev/null", "/proc/x.json"]
#: Copies of corpus results to draw: an empty ``-o`` draws beside the result,
#: which must not write into the repository's corpus.
RESULTS = WORK / "results"
shutil.copytree(ROOT / "tests" / "adversarial" / "results", RESULTS)
PICTURES = [str(WORK / "p.svg"), str(WORK / "p.txt"), "", "/missing/p.png", str(WORK / "protected.json")]
BASES = [str(WORK / "run"), str(WORK / "run2.csv"), "", "/missing/run", "/proc/run", str(WORK / "folder") + "/"]
INTS = st.sampled_from(["0", "-1", "-7", "1", "2", "3", "300", "1000000000000", "99999999999999999999", "x", "",
                        "1.5", "nan"])
SMALL_COUNTS = st.sampled_from(["1", "2", "0", "-1", "1001", "10000000000", "two"])
FLOATS = st.sampled_from(["0.1", "0.5", "1", "0", "-1", "-1e-5", "1e13", "-1e13", "nan", "inf", "-inf", "x", ""])
RANGES = st.sampled_from(["0.1:1:2", "0.5:1:1", "1:2", "a:b:c", "1:inf:2", "nan:1:2", "0:1:0", "1:2:100001",
                          "1e13:1e14:2", "-1:1:2", "", "0.1:1:-2"])
PATHS_TO_VARY = st.sampled_from(["links[thermometer->estimate].price", "links[estimate->thermometer].noise",
                                 "areas[estimate].weight", "links[nowhere->x].price", "", "budgets[total].total"])


def opt(name, values, p=0.5):
    """``[name, value]`` or nothing."""
    return st.one_of(st.just([]), st.tuples(st.just(name), values).map(list)) if p else st.just([])


def flag(name):
    return st.sampled_from([[], [name]])


def _combine(*parts):
    return st.tuples(*parts).map(lambda ps: [x for p in ps for x in (p if isinstance(p, list) else [p])])


DESIGNER = [opt("--restarts", SMALL_COUNTS), opt("--max-iter", st.sampled_from(["1", "5", "20", "0", "-3", "x",
                                                                                  "100000000"])),
            opt("--seed", INTS), flag("--force")]
STUDY = DESIGNER + [opt("--out", st.sampled_from(BASES)), opt("--plot", st.sampled_from(PICTURES)),
                    st.just(["--no-plot"]), flag("--cold"), flag("--fresh"), st.just(["--no-progress"]),
                    opt("--workers", st.sampled_from(["1", "0", "-2", "257", "x"]))]

COMMANDS = {
    "check": _combine(st.just("check"), st.sampled_from(SPEC_IN)),
    "evaluate": _combine(st.just("evaluate"), st.sampled_from(SPEC_IN), opt("--gains", st.sampled_from(GAINS_IN)),
                         opt("--json", st.sampled_from(OUT)), flag("--force")),
    "simulate": _combine(st.just("simulate"), st.sampled_from(SPEC_IN), opt("--gains", st.sampled_from(GAINS_IN)),
                         st.tuples(st.just("--steps"), st.sampled_from(["100", "200", "99", "0", "-5", "x",
                                                                         "1000000000"])).map(list),
                         opt("--chains", st.sampled_from(["2", "3", "1", "0", "-1", "100000", "x"])),
                         opt("--seed", INTS), opt("--level", FLOATS), opt("--json", st.sampled_from(OUT))),
    "design": _combine(st.just("design"), st.sampled_from(SPEC_IN), opt("--json", st.sampled_from(OUT)),
                       opt("--gains", st.sampled_from(OUT)), opt("--start", st.sampled_from(GAINS_IN)),
                       opt("--plot", st.sampled_from(PICTURES), p=0.1), st.just(["--no-reference"]),
                       st.tuples(st.just("--max-iter"), st.sampled_from(["1", "5", "20", "0", "-3", "x"])).map(list),
                       opt("--restarts", SMALL_COUNTS), opt("--seed", INTS), flag("--force"), flag("--progress")),
    "sweep": _combine(st.just("sweep"), st.sampled_from(SPEC_IN), PATHS_TO_VARY,
                      st.tuples(st.sampled_from(["--from", "--from="]), FLOATS).map(lambda t: [t[0] + t[1]]
                                                                                   if t[0].endswith("=") else list(t)),
                      st.tuples(st.just("--to"), FLOATS).map(list),
                      st.tuples(st.just("--points"), st.sampled_from(["2", "1", "3", "0", "-1", "100001",
                                                                       "x"])).map(list),
                      flag("--log"), *STUDY),
    "phase": _combine(st.just("phase"), st.sampled_from(SPEC_IN), st.just("--x"), PATHS_TO_VARY, st.just("--x-range"),
                      RANGES, st.just("--y"), PATHS_TO_VARY, st.just("--y-range"), RANGES, *STUDY),
    "compare": _combine(st.just("compare"), st.lists(st.sampled_from(BUDGET_SPECS + SPEC_IN[5:]), min_size=1,
                                                     max_size=3),
                        st.just("--budgets"), RANGES, opt("--tie", FLOATS), flag("--log"), *STUDY),
    "generate": _combine(st.just("generate"), st.tuples(st.just("--areas"), st.sampled_from(
                             ["2", "3", "0", "-1", "1001", "x"])).map(list),
                         st.tuples(st.just("--levels"), st.sampled_from(["1", "2", "0", "5", "x"])).map(list),
                         opt("--area-dim", st.sampled_from(["1", "2", "0", "-1", "100000000", "x"])),
                         opt("--world-dim", st.sampled_from(["1", "2", "4", "0", "7", "1000000000"])),
                         opt("--density", FLOATS), opt("--relays", FLOATS), opt("--seed", INTS),
                         opt("--max-lag", st.sampled_from(["0", "1", "-1", "51", "100000"])), flag("--budgets"),
                         st.tuples(st.just("-o"), st.sampled_from(OUT[:1] + OUT[2:] + [str(WORK / "g.yaml")])).map(list)),
    "render": _combine(st.just("render"), st.sampled_from([str(RESULTS / n)
                                                           for n in ("valid.json", "no-sensors.json", "deep.json",
                                                                     "power-nan.json")] + ["", str(WORK / "pipe")]),
                       st.tuples(st.just("-o"), st.sampled_from(PICTURES)).map(list),
                       opt("--width-by", st.sampled_from(["power", "share", "colour"]))),
}
#: How often each command comes up (the numeric ones most; render draws
#: with matplotlib and is slowest).
WEIGHTS = {"check": 2, "evaluate": 3, "simulate": 2, "design": 3, "sweep": 3, "phase": 2, "compare": 2,
           "generate": 2, "render": 1}
ARGV = st.sampled_from([c for c, w in WEIGHTS.items() for _ in range(w)]).flatmap(lambda c: COMMANDS[c])


class Hang(BaseException):
    pass


def _ring(signum, frame):
    raise Hang()


def run_in_process(argv):
    out, err = io.StringIO(), io.StringIO()
    old = signal.signal(signal.SIGALRM, _ring)
    signal.setitimer(signal.ITIMER_REAL, LIMIT)
    cwd = os.getcwd()
    os.chdir(WORK)  # default study outputs land here
    try:
        with contextlib.redirect_stdout(out), contextlib.redirect_stderr(err):
            try:
                status = main(argv)
            except SystemExit as exc:  # argparse's usage errors
                status = exc.code
    except Hang:
        pytest.fail(f"hung: hierarchy {argv!r}\n{err.getvalue()}")
    finally:
        os.chdir(cwd)
        signal.setitimer(signal.ITIMER_REAL, 0)
        signal.signal(signal.SIGALRM, old)
    return status, out.getvalue(), err.getvalue()


def check_contract(argv, status, out, err):
    assert "Traceback" not in out + err, (argv, err)
    assert status in (0, 1, 2), (argv, status, err)
    for stream in (out, err):
        assert "\x1b" not in stream, (argv, stream)
    if status == 2:
        errors = [l for l in err.splitlines() if l.startswith("error:")]
        assert len(errors) == 1, (argv, err)


def test_options_in_process():
    """Every case keeps the contract; then the run itself is checked: enough
    cases, every command reached, hostile values refused and valid command
    lines run. The cases are counted here, so the test stands alone in any
    order."""
    counts: Counter = Counter()

    @settings(max_examples=CASES, deadline=None, derandomize=True, database=None,
              suppress_health_check=list(HealthCheck))
    @given(ARGV)
    def one(argv):
        status, out, err = run_in_process(argv)
        counts[argv[0]] += 1
        counts[(argv[0], status)] += 1
        check_contract(argv, status, out, err)

    one()
    total = sum(v for k, v in counts.items() if isinstance(k, str))
    assert total >= CASES, counts
    for command in COMMANDS:
        assert counts[command] > 20, (command, counts)
        assert counts[(command, 2)] > 0, (command, counts)  # hostile values were refused
    # Valid command lines ran too, so the fuzz reached the computing code.
    for command in ("check", "evaluate", "design", "sweep", "generate"):
        assert counts[(command, 0)] > 0, (command, counts)


@settings(max_examples=5, deadline=None, derandomize=True, database=None, suppress_health_check=list(HealthCheck))
@given(ARGV)
def test_options_through_a_real_process(argv):
    env = dict(os.environ, PYTHONPATH=str(ROOT) + os.pathsep + os.environ.get("PYTHONPATH", ""))
    proc = subprocess.run([sys.executable, "-m", "hierarchy", *argv], capture_output=True, text=True, cwd=WORK,
                          env=env, timeout=120)
    check_contract(argv, proc.returncode, proc.stdout, proc.stderr)
