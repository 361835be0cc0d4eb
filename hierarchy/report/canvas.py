"""The matplotlib figure and Axes a drawing goes on: a figure on its own Agg
canvas (never pyplot), text measurement, and a check of a given ``ax=``."""

from __future__ import annotations

from hierarchy.errors import InputError

__all__ = []


def _figure(width, height):
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    fig = Figure(figsize=(width, height))
    FigureCanvasAgg(fig)
    return fig


def _renderer(fig):
    """The renderer that measures text on ``fig`` (Agg canvases have one;
    other backends build one on request)."""
    get = getattr(fig.canvas, "get_renderer", None)
    return get() if get is not None else fig._get_renderer()


def _axes_inches(ax):
    """Width and height of an Axes, in inches."""
    box = ax.get_position()
    return box.width * ax.figure.get_figwidth(), box.height * ax.figure.get_figheight()


def _check_axes(ax):
    if ax is not None and not hasattr(ax, "add_patch"):
        raise InputError(f"ax= takes one matplotlib Axes; got {ax!r}", place="ax",
                         fix="pass an Axes, e.g. from fig, ax = matplotlib.pyplot.subplots()")
