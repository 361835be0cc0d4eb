"""Shared set-up of the test files.

The shared helper functions live in ``tests/helpers.py`` (import them by
name: ``from helpers import random_gains``); this file only makes sure that
folder is importable whatever import mode pytest runs in.
"""

import sys
from pathlib import Path

_HERE = str(Path(__file__).resolve().parent)
if _HERE not in sys.path:
    sys.path.insert(0, _HERE)
