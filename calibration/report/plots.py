"""The report's plots as inline SVG (matplotlib's SVG canvas: no display, no pyplot state, no network).

Text stays text in the SVG (searchable, printable); element ids are derived from a fixed salt, so the
same bundle gives the same page byte for byte.
"""

from __future__ import annotations

import io

import matplotlib as mpl
import numpy as np
from matplotlib.backends.backend_svg import FigureCanvasSVG
from matplotlib.figure import Figure

from calibration.irt.likelihood import normal_weights
from calibration.irt.models import ItemParameters, expected_item_scores

THETA = np.linspace(-4.0, 4.0, 161)
"""The theta range every plot shows."""
# equitheta's own colours: a deep teal for the reference, a warm clay for the group, a slate for text.
REFERENCE_COLOUR, GROUP_COLOUR, INK = "#1f6f78", "#c0622d", "#334155"
SERIES = ("#1f6f78", "#c0622d", "#6b5b95", "#3a7d44", "#b5838d", "#8d6e2f", "#2d4a8a", "#7a7a7a")


def _svg(figure: Figure) -> str:
    """The figure as an inline ``<svg>`` element (no XML prologue or doctype)."""
    buffer = io.StringIO()
    with mpl.rc_context({"svg.hashsalt": "equitheta", "svg.fonttype": "none"}):
        FigureCanvasSVG(figure).print_svg(buffer, metadata={"Date": None, "Creator": None})
    text = buffer.getvalue()
    return text[text.index("<svg") :]


def _figure(width: float = 4.4, height: float = 2.9) -> tuple[Figure, object]:
    figure = Figure(figsize=(width, height), layout="constrained")
    axes = figure.add_subplot()
    axes.tick_params(colors=INK, labelsize=9)
    for spine in ("top", "right"):
        axes.spines[spine].set_visible(False)
    return figure, axes


def item_curves_svg(
    reference: ItemParameters, group: ItemParameters | None, *, group_name: str, mean: float, sd: float, title: str
) -> str:
    """One item's expected score by theta: the reference curve, the group's own (when known) and the group's
    latent density shaded below them."""
    figure, axes = _figure()
    top = float(reference.n_categories[0] - 1)
    density = normal_weights(THETA, mean, sd)
    axes.fill_between(THETA, 0, density / density.max() * top * 0.25, color=GROUP_COLOUR, alpha=0.12, linewidth=0)
    axes.plot(THETA, expected_item_scores(reference, THETA)[0], color=REFERENCE_COLOUR, linewidth=2, label="reference")
    if group is not None:
        axes.plot(
            THETA,
            expected_item_scores(group, THETA)[0],
            color=GROUP_COLOUR,
            linewidth=2,
            linestyle="--",
            label=group_name,
        )
    axes.set_xlabel("theta", color=INK, fontsize=10)
    axes.set_ylabel("expected score", color=INK, fontsize=10)
    axes.set_ylim(0, top * 1.02)
    axes.set_title(title, color=INK, fontsize=11)
    axes.legend(frameon=False, fontsize=9, loc="upper left")
    return _svg(figure)


def information_svg(curves: dict[str, tuple[np.ndarray, np.ndarray]]) -> str:
    """Test information (left) and the conditional SE 1/sqrt(I) (right) by group, over theta."""
    figure = Figure(figsize=(8.4, 3.2), layout="constrained")
    left, right = figure.subplots(1, 2)
    for axes in (left, right):
        axes.tick_params(colors=INK, labelsize=8)
        for spine in ("top", "right"):
            axes.spines[spine].set_visible(False)
        axes.set_xlabel("theta", color=INK, fontsize=9)
    for (group, (theta, information)), colour in zip(curves.items(), SERIES * 4, strict=False):
        left.plot(theta, information, color=colour, linewidth=2, label=group)
        right.plot(theta, 1.0 / np.sqrt(information), color=colour, linewidth=2, label=group)
    left.set_ylabel("test information", color=INK, fontsize=9)
    right.set_ylabel("SE of theta", color=INK, fontsize=9)
    right.set_ylim(0, min(2.0, float(max(1.0 / np.sqrt(i).min() for _, i in curves.values()) * 4)))
    left.legend(frameon=False, fontsize=8)
    return _svg(figure)
