"""Shared look of the report figures: palette, line styles, saving.

Colours are the Okabe-Ito palette (Okabe & Ito 2008, "Color Universal Design"),
safe for the common colour-vision deficiencies; every series also differs by
line style or marker so that a greyscale print stays readable.
"""

from __future__ import annotations

import io
from dataclasses import dataclass
from pathlib import Path

import matplotlib

matplotlib.use("Agg")  # files only, never a window

import matplotlib.pyplot as plt  # noqa: E402

__all__ = ["OKABE_ITO", "LINESTYLES", "MARKERS", "SavedFigure", "save_figure", "new_figure",
           "VALUE_RAMP", "value_colormap"]

OKABE_ITO = {
    "black": "#000000",
    "orange": "#E69F00",
    "sky": "#56B4E9",
    "green": "#009E73",
    "yellow": "#F0E442",
    "blue": "#0072B2",
    "vermillion": "#D55E00",
    "purple": "#CC79A7",
}
#: Series colours in order of use (yellow last: weak on white).
SERIES = ["#0072B2", "#D55E00", "#009E73", "#CC79A7", "#E69F00", "#56B4E9", "#000000", "#F0E442"]
LINESTYLES = ["-", "--", ":", "-."]
MARKERS = ["o", "s", "^", "D", "v", "P"]
#: Sequential colour map that is monotone in lightness (prints in greyscale).
SEQUENTIAL = "cividis"
#: Our ramp for values painted on the tree (ancestral values): deep indigo through teal
#: and moss to pale straw; CIE L* rises at every step (tests/report/test_ancestral_report.py).
VALUE_RAMP = ["#1d1340", "#33336e", "#2e5f86", "#2f8a86", "#68ad6e", "#b9cc72", "#f3ecb4"]


def value_colormap():
    """The :data:`VALUE_RAMP` as a matplotlib colour map (dark = low, light = high)."""
    from matplotlib.colors import LinearSegmentedColormap

    return LinearSegmentedColormap.from_list("cladewise_values", VALUE_RAMP)

_RC = {
    "font.size": 9,
    "axes.titlesize": 10,
    "axes.labelsize": 9,
    "axes.spines.top": False,
    "axes.spines.right": False,
    "savefig.dpi": 110,
    # text drawn as paths: the SVG carries no user string as markup at all
    "svg.fonttype": "path",
    "svg.hashsalt": "cladewise",  # stable ids, reproducible files
}


def new_figure(width: float, height: float, **kwargs):
    """A figure with the report style (returns ``fig, axes`` like ``plt.subplots``)."""
    with plt.rc_context(_RC):
        return plt.subplots(figsize=(width, height), **kwargs)


@dataclass
class SavedFigure:
    """A figure written to disk: name, caption and the PNG bytes for embedding."""

    name: str
    title: str
    caption: str
    png: Path
    svg: Path
    png_bytes: bytes


def save_figure(fig, folder: Path, name: str, title: str, caption: str, svg: bool = True) -> SavedFigure:
    """Write ``folder/name.png`` and ``folder/name.svg`` and close the figure."""
    folder.mkdir(parents=True, exist_ok=True)
    png_path, svg_path = folder / f"{name}.png", folder / f"{name}.svg"
    with plt.rc_context(_RC):
        buf = io.BytesIO()
        fig.savefig(buf, format="png", bbox_inches="tight")
        data = buf.getvalue()
        png_path.write_bytes(data)
        if svg:
            fig.savefig(svg_path, format="svg", bbox_inches="tight", metadata={"Date": None})
    plt.close(fig)
    return SavedFigure(name, title, caption, png_path, svg_path, data)
