"""The README's Python examples run as written (common practice, no source:
an example that does not run teaches the wrong API)."""

from __future__ import annotations

import os
import re
import shutil
import subprocess
import sys
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]


def python_blocks(text: str) -> list:
    """The fenced ```python blocks of a Markdown text, in order."""
    return re.findall(r"^```python\n(.*?)^```$", text, flags=re.MULTILINE | re.DOTALL)


def test_the_readme_has_its_examples():
    blocks = python_blocks((ROOT / "README.md").read_text())
    assert len(blocks) >= 2
    joined = "\n".join(blocks)
    assert "to_pandas()" in joined and "ax=" in joined


def test_the_readme_python_examples_run(tmp_path):
    # One script, in order (the second block goes on with the first one's
    # circuit and result), in a folder of its own with the example specs, as
    # a reader at the repository root would run it; no display (Agg).
    shutil.copytree(ROOT / "specs", tmp_path / "specs")
    script = tmp_path / "readme.py"
    script.write_text("\n".join(python_blocks((ROOT / "README.md").read_text())))
    env = {**os.environ, "MPLBACKEND": "Agg", "OPENBLAS_NUM_THREADS": "1",
           "PYTHONPATH": os.pathsep.join([str(ROOT), os.environ.get("PYTHONPATH", "")])}
    out = subprocess.run([sys.executable, str(script)], cwd=tmp_path, env=env,
                         capture_output=True, text=True, timeout=300)
    assert out.returncode == 0, out.stderr
    # What the examples say they make: the gains file, the figure, the tables.
    assert (tmp_path / "design.json").is_file()
    assert (tmp_path / "two-level.png").read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    assert "probe->station-view" in out.stdout and "upstream-view" in out.stdout
