"""The gallery's one command works on small settings and documents itself."""

import subprocess
import sys
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT / "gallery"))

import make  # noqa: E402  (gallery/make.py)


def test_gallery_command_makes_every_picture(tmp_path):
    done = subprocess.run([sys.executable, "gallery/make.py", "--quick", "--out", str(tmp_path)],
                          cwd=ROOT, capture_output=True, text=True, timeout=600)
    assert done.returncode == 0, done.stderr
    readme = (tmp_path / "README.md").read_text()
    for stem, _, template, _ in make.ENTRIES:
        png = tmp_path / f"{stem}.png"
        assert png.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n", stem
        assert f"({stem}.png)" in readme
        # The README shows the command as a user runs it from the repository root.
        assert "hierarchy " + template.format(out="gallery").split(" --")[0] in readme
