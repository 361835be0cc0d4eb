"""The gallery's one command works on small settings, documents itself, and
the committed pictures' numbers still match what the tool computes now."""

import json
import shlex
import subprocess
import sys
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT / "gallery"))

import make  # noqa: E402  (gallery/make.py)


@pytest.fixture(scope="module")
def quick_run(tmp_path_factory):
    out = tmp_path_factory.mktemp("gallery")
    done = subprocess.run([sys.executable, "gallery/make.py", "--quick", "--out", str(out)],
                          cwd=ROOT, capture_output=True, text=True, timeout=900)
    assert done.returncode == 0, done.stderr
    return out


def test_gallery_command_makes_every_picture(quick_run):
    readme = (quick_run / "README.md").read_text()
    for e in make.ENTRIES:
        png = quick_run / f"{e.stem}.png"
        assert png.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n", e.stem
        assert f"({e.stem}.png)" in readme and e.shows in readme
        # The README shows the command as a user runs it from the repository root.
        assert "hierarchy " + e.command.format(out="gallery").split(" --")[0] in readme
        for name in e.numbers:
            assert (quick_run / name).exists(), name


def test_every_command_is_safe_to_paste_into_a_shell(tmp_path):
    # Pasted into bash, each command must reach the tool word for word, and
    # the shell must not redirect anything into a file (the `>` of `->`).
    for e in make.ENTRIES:
        cmd = e.command.format(out="gallery")
        done = subprocess.run(["bash", "-c", "printf '%s\\n' " + cmd], cwd=tmp_path, capture_output=True,
                              text=True, timeout=30)
        assert done.returncode == 0, done.stderr
        assert done.stdout.splitlines() == shlex.split(cmd), cmd
        assert list(tmp_path.iterdir()) == [], cmd


def test_quick_grids_are_subsets_of_the_full_ones():
    from hierarchy.studies import grid, parse_range

    for e in make.ENTRIES:
        for old, new in e.quick.items():
            if ":" in old:
                full, quick = (grid(*parse_range(v, "range"), log=True) for v in (old, new))
            else:
                n_full, n_quick = int(old.split()[-1]), int(new.split()[-1])
                full, quick = grid(1e-4, 1, n_full, log=True), grid(1e-4, 1, n_quick, log=True)
            for v in quick:
                assert min(abs(v / f - 1) for f in full) < 1e-9, (e.stem, v)


def test_committed_numbers_match_a_fresh_quick_run(quick_run):
    problems = make.check_numbers(ROOT / "gallery", quick_run)
    assert problems == [], ("the gallery's numbers no longer match the tool; remake it with "
                            "`python gallery/make.py`:\n" + "\n".join(problems))


def test_the_check_catches_a_changed_number(quick_run, tmp_path):
    # A copy of the fresh run with one number moved by 1%: the check must say where.
    for e in make.ENTRIES:
        for name in e.numbers:
            (tmp_path / name).write_text((quick_run / name).read_text())
    data = json.loads((tmp_path / "two-senses.json").read_text())
    data["objective"] *= 1.01
    lid = max(data["links"], key=lambda k: data["links"][k]["power"])
    data["links"][lid]["power"] *= 1.2
    (tmp_path / "two-senses.json").write_text(json.dumps(data))
    study = json.loads((tmp_path / "phase-prediction.json").read_text())
    row = next(r for r in study["rows"] if r.get("converged"))
    row["objective"] *= 1.01
    (tmp_path / "phase-prediction.json").write_text(json.dumps(study))
    assert make.check_numbers(quick_run, quick_run) == []  # a run agrees with itself
    problems = make.check_numbers(tmp_path, quick_run)
    assert any(p.startswith("two-senses.json: objective") for p in problems)
    assert any(p.startswith(f"two-senses.json: links.{lid}.power") for p in problems)
    assert any(p.startswith("phase-prediction.json at ") and "objective" in p for p in problems)
    assert len(problems) == 3
