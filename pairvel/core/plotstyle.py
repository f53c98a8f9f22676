"""One look for every figure pairvel writes: sizes for a journal column or page, legible fonts,
and a writer that saves each figure as vector PDF and as a 200-dpi PNG.

Figures are :class:`matplotlib.figure.Figure` objects made without :mod:`matplotlib.pyplot`, so
drawing one neither selects a backend nor leaves a figure open in a user's notebook; the style is
applied with :func:`matplotlib.rc_context`, which restores the caller's settings on exit.

Example
-------
>>> with plot_style():                                   # doctest: +SKIP
...     fig = new_figure(width="column", height_in=2.6)
...     ax = fig.add_subplot()
...     ax.plot([1, 2], [3, 4])
...     save_figure(fig, folder, "example")              # example.pdf, example.png
"""

from __future__ import annotations

__all__ = ["COLUMN_WIDTH_IN", "PAGE_WIDTH_IN", "PNG_DPI", "RC", "new_figure", "plot_style", "save_figure"]

import contextlib
from pathlib import Path

#: Width of one column of a two-column journal page, inches.
COLUMN_WIDTH_IN = 3.4
#: Width of the text block of a journal page, inches.
PAGE_WIDTH_IN = 7.0
#: Resolution of the PNG copies (the PDF copies are vector graphics).
PNG_DPI = 200

#: matplotlib settings of every pairvel figure; fonts in points, legible at the widths above.
RC = {
    "font.size": 8.5,
    "axes.titlesize": 8.5,
    "axes.labelsize": 8.5,
    "xtick.labelsize": 7.5,
    "ytick.labelsize": 7.5,
    "legend.fontsize": 7.0,
    "legend.frameon": True,
    "legend.framealpha": 0.85,
    "legend.edgecolor": "0.85",
    "figure.titlesize": 9.0,
    "axes.linewidth": 0.7,
    "lines.linewidth": 1.2,
    "lines.markersize": 3.5,
    "errorbar.capsize": 2.0,
    "xtick.direction": "in",
    "ytick.direction": "in",
    "xtick.top": True,
    "ytick.right": True,
    "mathtext.default": "regular",
    "pdf.fonttype": 42,  # TrueType in the PDF: text stays text for journals and editors
    "savefig.dpi": PNG_DPI,
    "image.cmap": "viridis",
}

_WIDTHS = {"column": COLUMN_WIDTH_IN, "page": PAGE_WIDTH_IN}


@contextlib.contextmanager
def plot_style():
    """Context in which figures are drawn with :data:`RC`; the previous settings come back on exit."""
    import matplotlib

    with matplotlib.rc_context(RC):
        yield


def new_figure(*, width="column", height_in: float | None = None):
    """A constrained-layout :class:`~matplotlib.figure.Figure` of a journal width.

    Parameters
    ----------
    width : "column", "page" or float, default "column"
        :data:`COLUMN_WIDTH_IN`, :data:`PAGE_WIDTH_IN` or a width in inches.
    height_in : float, optional
        Default: 0.75 of the width.
    """
    from matplotlib.figure import Figure

    w = _WIDTHS[width] if isinstance(width, str) else float(width)
    return Figure(figsize=(w, 0.75 * w if height_in is None else float(height_in)), layout="constrained")


def save_figure(fig, folder, stem: str) -> list[str]:
    """Write ``<stem>.pdf`` and ``<stem>.png`` (:data:`PNG_DPI`) into ``folder``; return the file names.

    The PDF carries no creation date, so a rerun writes the same bytes.
    """
    folder = Path(folder)
    names = [f"{stem}.pdf", f"{stem}.png"]
    fig.savefig(folder / names[0], format="pdf", metadata={"CreationDate": None})
    fig.savefig(folder / names[1], format="png", dpi=PNG_DPI)
    return names
