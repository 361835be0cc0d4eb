"""The adversarial corpus (tests/adversarial/, made by make_corpus.py) through
every reader and every command that reads it (issue 16).

The contract for every file and every reader: the file is read, or refused
with a :class:`~hierarchy.errors.HierarchyError` (one message, exit status
2 from the command line); never another exception, never a hang (each case
runs under an alarm), and nothing printed can drive the terminal.
Special files that git cannot keep (named pipes, devices, folders, dangling
links) are made here.
"""

from __future__ import annotations

import contextlib
import io
import json
import os
import shutil
import signal
import tempfile
from pathlib import Path

import pytest

from hierarchy.cli import main
from hierarchy.errors import HierarchyError
from hierarchy.loop.gains import load_gains
from hierarchy.report.drawing import read_result
from hierarchy.spec import load_spec
from hierarchy.studies.runner import _load_part

ROOT = Path(__file__).resolve().parents[1]
CORPUS = ROOT / "tests" / "adversarial"
SPEC = load_spec(ROOT / "specs" / "single-loop.yaml")
KINDS = ("specs", "gains", "results", "parts")
FILES = sorted(p for kind in KINDS for p in (CORPUS / kind).iterdir())
#: Seconds one read may take (the largest corpus file is 140 kB).
LIMIT = 10


class Hang(BaseException):
    pass


@contextlib.contextmanager
def alarm(seconds=LIMIT):
    def ring(signum, frame):
        raise Hang()

    old = signal.signal(signal.SIGALRM, ring)
    signal.setitimer(signal.ITIMER_REAL, seconds)
    try:
        yield
    except Hang:
        pytest.fail(f"ran longer than {seconds} s")
    finally:
        signal.setitimer(signal.ITIMER_REAL, 0)
        signal.signal(signal.SIGALRM, old)


def _part(path):
    """A resumed study's reader: a bad part is ``None`` (designed again)."""
    got = _load_part(Path(path).parent, Path(path).stem)
    assert got is None or (isinstance(got["row"], dict)), got
    return got


READERS = {"spec": load_spec, "gains": lambda p: load_gains(p, SPEC), "gains-alone": load_gains,
           "result": read_result, "part": _part}


def test_corpus_is_large_enough():
    counts = {kind: len(list((CORPUS / kind).iterdir())) for kind in KINDS}
    assert sum(counts.values()) >= 60 and all(counts.values()), counts


def test_corpus_is_what_the_script_makes(tmp_path):
    """The kept files are exactly those make_corpus.py writes (so each case
    is documented by the code that made it)."""
    import importlib.util

    spec = importlib.util.spec_from_file_location("make_corpus", CORPUS / "make_corpus.py")
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    for kind, make in module.FOLDERS.items():
        made = {name: c if isinstance(c, bytes) else c.encode() for name, c in make().items()}
        kept = {p.name: p.read_bytes() for p in (CORPUS / kind).iterdir()}
        assert made == kept, kind


@pytest.mark.parametrize("path", FILES, ids=lambda p: f"{p.parent.name}/{p.name}")
def test_every_reader_reads_or_refuses(path):
    for name, reader in READERS.items():
        with alarm():
            try:
                reader(str(path))
            except HierarchyError as err:
                text = str(err)
                assert text and "\x1b" not in text and "\u202e" not in text, (name, text)


def _cli(*argv):
    out, err = io.StringIO(), io.StringIO()
    with alarm(60), contextlib.redirect_stdout(out), contextlib.redirect_stderr(err):
        try:
            status = main([str(a) for a in argv])
        except SystemExit as exc:
            status = exc.code
    out, err = out.getvalue(), err.getvalue()
    assert "Traceback" not in err
    for stream in (out, err):
        assert "\x1b" not in stream and "\u202e" not in stream and "\x07" not in stream
    return status, out, err


def _contract(status, out, err, allowed=(0, 2)):
    assert status in allowed, (status, out, err)
    if status == 2:
        assert len([l for l in err.splitlines() if l.startswith("error:")]) == 1, err


@pytest.mark.parametrize("path", sorted((CORPUS / "specs").iterdir()), ids=lambda p: p.name)
def test_check_and_evaluate_on_every_spec(path):
    _contract(*_cli("check", path))
    # A spec that reads and pins every gain can be evaluated as it is.
    try:
        spec = load_spec(path)
    except HierarchyError:
        return
    from hierarchy.loop.gains import Gains, with_pins

    try:
        from hierarchy.loop.gains import check_gains

        check_gains(spec, with_pins(spec, Gains()))
    except HierarchyError:
        return
    _contract(*_cli("evaluate", path))


def test_the_ill_conditioned_corpus_specs_are_refused_not_reported():
    for name in ("pin-non-normal.yaml",):
        status, out, err = _cli("evaluate", CORPUS / "specs" / name)
        assert status == 2 and "too badly conditioned" in err, (name, out, err)
    # The cancelling loop is well within double precision: its numbers are
    # reported, and they are possible ones.
    status, out, err = _cli("evaluate", CORPUS / "specs" / "pin-1e12-cancelling.yaml", "--json",
                            Path(tempfile.mkdtemp()) / "s.json")
    assert status == 0, err


@pytest.mark.parametrize("path", sorted((CORPUS / "gains").iterdir()), ids=lambda p: p.name)
def test_evaluate_and_design_start_on_every_gains_file(path):
    spec = str(ROOT / "specs" / "single-loop.yaml")
    _contract(*_cli("evaluate", spec, "--gains", path))
    _contract(*_cli("design", spec, "--start", path, "--restarts", "1", "--max-iter", "20"), allowed=(0, 1, 2))


@pytest.mark.parametrize("path", sorted((CORPUS / "results").iterdir()), ids=lambda p: p.name)
def test_render_every_result(path, tmp_path):
    _contract(*_cli("render", path, "-o", tmp_path / "x.svg"))


def test_a_resumed_sweep_designs_every_corrupt_part_again(tmp_path):
    """Each corpus part is put where a finished point of the sweep belongs;
    the resumed sweep must design that point again, and finish."""
    spec = str(ROOT / "specs" / "single-loop.yaml")
    argv = ("sweep", spec, "links[thermometer->estimate].price", "--from", "0.1", "--to", "1", "--points", "2",
            "--workers", "1", "--no-plot", "--no-progress", "--restarts", "1", "--out", tmp_path / "run")
    status, out, err = _cli(*argv)
    assert status == 0, err
    parts = sorted((tmp_path / "run.parts").glob("*.json"))
    assert len(parts) >= 2  # forward walk, backward walk, and cold designs where they disagree
    good = json.loads((tmp_path / "run.json").read_text())["rows"]
    for corrupt in sorted((CORPUS / "parts").iterdir()):
        shutil.copyfile(corrupt, parts[0])
        status, out, err = _cli(*argv)
        assert status == 0, (corrupt.name, err)
        rows = json.loads((tmp_path / "run.json").read_text())["rows"]
        assert rows[0]["objective"] == pytest.approx(good[0]["objective"], rel=1e-9), corrupt.name
        assert json.loads(parts[0].read_text())["format"] == "hierarchy-point"  # rewritten whole


def _special_files(tmp_path):
    fifo = tmp_path / "pipe"
    os.mkfifo(fifo)
    dangling = tmp_path / "dangling.json"
    dangling.symlink_to(tmp_path / "nowhere")
    folder = tmp_path / "folder.json"
    folder.mkdir()
    loop = tmp_path / "loop.json"
    loop.symlink_to(loop)
    out = [fifo, dangling, folder, loop]
    for device in ("/dev/zero", "/dev/null", "/dev/urandom", "/dev/tty"):
        if os.path.exists(device):
            link = tmp_path / f"{Path(device).name}.json"
            link.symlink_to(device)
            out += [Path(device), link]
    return out


def test_special_files_through_every_reader_and_command(tmp_path):
    spec = str(ROOT / "specs" / "single-loop.yaml")
    for path in _special_files(tmp_path):
        for name, reader in READERS.items():
            with alarm(5):
                try:
                    got = reader(str(path))
                except HierarchyError:
                    continue
            assert name == "part" and got is None, (name, path)
        for argv in (("check", path), ("evaluate", spec, "--gains", path), ("render", path, "-o", tmp_path / "x.png"),
                     ("design", spec, "--start", path)):
            status, out, err = _cli(*argv)
            _contract(status, out, err)
            assert status == 2, (argv, out, err)
