"""Writing a matplotlib figure to a file, the same way for every command."""

from __future__ import annotations

import os

#: Figure formats the commands write, chosen by the file suffix.
FIGURE_SUFFIXES = (".png", ".svg", ".pdf")

_METADATA = {
    "png": {"Software": None},
    "svg": {"Date": None},
    "pdf": {"CreationDate": None, "ModDate": None, "Producer": None, "Creator": None},
}


def save_figure(fig, path: str | os.PathLike, dpi: int = 130) -> None:
    """Write ``fig`` to ``path`` in the format of its suffix (.png, .svg or
    .pdf), with the Agg canvas and without dates or software names in the
    file, so the same figure gives the same bytes."""
    import matplotlib
    from matplotlib.backends.backend_agg import FigureCanvasAgg

    FigureCanvasAgg(fig)
    fmt = os.fspath(path).rsplit(".", 1)[-1].lower()
    with matplotlib.rc_context({"svg.hashsalt": "loopcheck"}):
        # a figure that lays itself out completely (attribute set by its
        # builder) is saved as it is: a tight bounding box costs a second draw
        bbox = None if getattr(fig, "loopcheck_fits", False) else "tight"
        fig.savefig(path, dpi=dpi, bbox_inches=bbox, metadata=_METADATA.get(fmt), format=fmt)
