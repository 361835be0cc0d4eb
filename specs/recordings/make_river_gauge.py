"""Simulate the recording `river-gauge.csv` from a river world of our own.

A slow upstream flow drives two water levels at a gauging station (the world
of `specs/two-level.yaml`, with numbers of our own). The script writes 4000
steps of the three channels, so that `hierarchy fit-world` has a recording
whose true world is known:

    python specs/recordings/make_river_gauge.py      # rewrites river-gauge.csv

    hierarchy fit-world specs/recordings/river-gauge.csv \\
        --blocks upstream=flow station=level_a,level_b --zero station:upstream -o world.yaml

The fitted world is in `specs/fitted-river.yaml`; `tests/test_fitworld.py`
checks that the fit recovers the world below within sampling error.
"""

from pathlib import Path

import numpy as np

#: The true world: state [flow, level_a, level_b].
A = np.array([[0.95, 0.0, 0.0],
              [0.30, 0.60, 0.10],
              [0.20, 0.00, 0.50]])
Q = np.array([[0.04, 0.0, 0.0],
              [0.0, 0.10, 0.03],
              [0.0, 0.03, 0.08]])
CHANNELS = ("flow", "level_a", "level_b")
STEPS = 4000
SEED = 20261202
#: Steps run before recording, so that the recording starts stationary.
BURN_IN = 500


def simulate(steps=STEPS, seed=SEED) -> np.ndarray:
    """``steps`` x 3 samples of the world, after a burn-in."""
    rng = np.random.default_rng(seed)
    chol = np.linalg.cholesky(Q)
    x = np.zeros(3)
    out = np.empty((steps, 3))
    for t in range(BURN_IN + steps):
        x = A @ x + chol @ rng.standard_normal(3)
        if t >= BURN_IN:
            out[t - BURN_IN] = x
    return out


def main() -> None:
    data = simulate()
    lines = [",".join(CHANNELS)] + [",".join(f"{v:.6f}" for v in row) for row in data]
    Path(__file__).with_name("river-gauge.csv").write_text("\n".join(lines) + "\n")


if __name__ == "__main__":
    main()
