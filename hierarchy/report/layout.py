"""Where a drawing puts its boxes: rows by level, box sizes, and the order
within a row that cuts crossings (barycentre sweeps)."""

from __future__ import annotations

from hierarchy.report.style import _FONT

__all__ = ["crossings"]

_LEVEL_GAP = 2.6  # data units (inches at full size) between levels
_NODE_GAP = 1.6  # between boxes on one level
_BOX_HEIGHT = 0.62
_PAIR_RAD = 0.28  # bow of each arrow of a prediction/residual pair


# -- layout ------------------------------------------------------------------


def _box_size(label, fontsize):
    # Average glyph ~0.58 em wide; 72 points per inch and one data unit per inch.
    chars = max(len(line) for line in label.split("\n"))
    return max(1.25, 0.58 * fontsize / 72 * chars + 0.35), _BOX_HEIGHT


def _rows(g):
    """Nodes by row: their level, or one row above the top for unplaced areas."""
    known = [d.get("level") for _, d in g.nodes(data=True) if d.get("level") is not None]
    top = max(known, default=0)
    rows = {}
    for n, d in g.nodes(data=True):
        level = d.get("level")
        rows.setdefault(top + 1 if level is None else level, []).append(n)
    return {k: rows[k] for k in sorted(rows)}, top


def _centres(rows, size):
    """x of every node when each row is centred, boxes _NODE_GAP apart."""
    x = {}
    for nodes in rows.values():
        left = -(sum(size[n][0] for n in nodes) + _NODE_GAP * (len(nodes) - 1)) / 2
        for n in nodes:
            x[n] = left + size[n][0] / 2
            left += size[n][0] + _NODE_GAP
    return x


def crossings(g, rows) -> int:
    """Crossings between the links that join neighbouring rows (straight-line
    count; links that skip rows are left out of the count).

    Examples
    --------
    >>> import networkx as nx
    >>> g = nx.DiGraph([("a", "d"), ("b", "c")])
    >>> crossings(g, {0: ["a", "b"], 1: ["c", "d"]}), crossings(g, {0: ["a", "b"], 1: ["d", "c"]})
    (1, 0)
    """
    import numpy as np

    index = {n: (k, i) for k, nodes in rows.items() for i, n in enumerate(nodes)}
    keys = list(rows)
    total = 0
    for lo, hi in zip(keys, keys[1:]):
        pairs = {tuple(sorted((u, v), key=lambda n: index[n][0])) for u, v in g.edges
                 if {index[u][0], index[v][0]} == {lo, hi}}
        if len(pairs) < 2:
            continue
        a = np.array([index[p][1] for p, _ in pairs])
        b = np.array([index[q][1] for _, q in pairs])
        total += int(np.sum((a[:, None] < a[None, :]) & (b[:, None] > b[None, :])))
    return total


def _order_rows(g, rows, size, sweeps=8):
    """Reorder each row to cut crossings: barycentre sweeps up and down
    (Sugiyama, Tagawa & Toda 1981), keeping the best order seen."""
    rows = {k: sorted(v, key=list(g.nodes).index) for k, v in rows.items()}
    best, best_count = {k: list(v) for k, v in rows.items()}, crossings(g, rows)
    keys = list(rows)
    for sweep in range(sweeps):
        order = keys[1:] if sweep % 2 == 0 else keys[-2::-1]
        for k in order:
            x = _centres(rows, size)
            done = [j for j in keys if (j < k if sweep % 2 == 0 else j > k)]

            def key(n, done=done, x=x, k=k):
                near = [x[m] for m in set(g.predecessors(n)) | set(g.successors(n))
                        if any(m in rows[j] for j in done)]
                return sum(near) / len(near) if near else x[n]
            rows[k] = sorted(rows[k], key=key)
        count = crossings(g, rows)
        if count < best_count:
            best, best_count = {k: list(v) for k, v in rows.items()}, count
    return best


def _layout(g, labels):
    """Rows by level (sensors bottom), ordered to cut crossings; centres and sizes."""
    rows, top = _rows(g)
    size = {n: _box_size(labels[n], _FONT) for n in g.nodes}
    rows = _order_rows(g, rows, size)
    x = _centres(rows, size)
    pos = {n: (x[n], level * _LEVEL_GAP) for level, nodes in rows.items() for n in nodes}
    return pos, size, rows, top
