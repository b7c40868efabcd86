"""One look for every crankbeat figure (Agg backend, our own palette)."""

from __future__ import annotations

import json

import matplotlib

matplotlib.use("Agg")

import matplotlib.pyplot as plt  # noqa: E402

#: Colours per cylinder, then the verdict marks.
CYLINDER_COLOURS = ("#1f6f8b", "#d17a22", "#4f8f3a", "#8e4a9e", "#b8a200", "#5c6f7f")
MISFIRE_COLOUR = "#c0262d"
MUTED_COLOUR = "#9aa3ab"
THRESHOLD_COLOUR = "#333333"


def cyl_colour(cylinder: int) -> str:
    return CYLINDER_COLOURS[(int(cylinder) - 1) % len(CYLINDER_COLOURS)]


def new_figure(width: float = 9.0, height: float = 4.0, **kw):
    plt.rcParams.update({
        "font.size": 9, "axes.titlesize": 10, "axes.labelsize": 9, "legend.fontsize": 8,
        "axes.grid": True, "grid.alpha": 0.3, "axes.spines.top": False,
        "axes.spines.right": False,
    })
    return plt.subplots(figsize=(width, height), **kw)


def axes_text(fig) -> list[dict[str, str]]:
    """Title and axis labels of every panel of ``fig`` (colour bars included)."""
    return [{"title": ax.get_title() or ax.get_title(loc="left"), "xlabel": ax.get_xlabel(),
             "ylabel": ax.get_ylabel()} for ax in fig.get_axes()]


def save(fig, path) -> None:
    """Write the PNG; its text chunk ``Axes`` keeps the panels' titles and axis labels, so a
    reader (or a test) can tell what the picture shows without looking at pixels."""
    fig.tight_layout()
    title = fig._suptitle.get_text() if fig._suptitle is not None else ""
    fig.savefig(path, dpi=110, metadata={"Axes": json.dumps(axes_text(fig)), "Title": title})
    plt.close(fig)


def saved_title(path) -> str:
    """The figure's overall title :func:`save` kept in a PNG ("" when it has none)."""
    from PIL import Image

    with Image.open(path) as img:
        return img.text.get("Title", "")


def saved_axes(path) -> list[dict[str, str]]:
    """The titles and axis labels :func:`save` kept in a PNG."""
    from PIL import Image

    with Image.open(path) as img:
        return json.loads(img.text.get("Axes", "[]"))
