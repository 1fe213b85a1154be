"""Every command writes its figure through loopcheck.figures.figure_io.save_figure:
the format follows the suffix and the bytes carry no date, so the same
figure gives the same file (matplotlib's documented ``metadata`` keys of
``Figure.savefig``; common practice for reproducible outputs)."""

import pytest
from matplotlib.figure import Figure

from loopcheck.figures.figure_io import FIGURE_SUFFIXES, save_figure

MAGIC = {".png": b"\x89PNG", ".svg": b"<?xml", ".pdf": b"%PDF"}


def _figure():
    fig = Figure(figsize=(3, 2))
    ax = fig.add_subplot()
    ax.plot([0, 1, 2], [1, 0, 1], label="curve")
    ax.set_xlabel("frequency [Hz]")
    ax.legend()
    return fig


@pytest.mark.parametrize("suffix", FIGURE_SUFFIXES)
def test_format_follows_the_suffix_and_bytes_repeat(tmp_path, suffix):
    a, b = tmp_path / f"a{suffix}", tmp_path / f"b{suffix}"
    save_figure(_figure(), a)
    save_figure(_figure(), b)
    data = a.read_bytes()
    assert data.startswith(MAGIC[suffix])
    assert data == b.read_bytes()
