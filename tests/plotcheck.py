"""What a plot shows, read from the figure that was saved and from the PNG written.

``drawn`` (a fixture in conftest) records every figure saved during a test; ``check_plot`` then asserts
that it carries labelled axes, draws the expected number of data markers and that the PNG is not blank.
"""

from __future__ import annotations

import os

import numpy as np
from matplotlib.image import imread


def marker_points(ax) -> int:
    """Data markers drawn on an axes: marker-only lines (plot with a marker, errorbar points) and scatters."""
    n = 0
    for line in ax.lines:
        # error-bar caps are marker-only lines too ("_" or "|"): not data
        if line.get_marker() not in (None, "None", "", " ", "_", "|") and line.get_linestyle() in ("None", "", " "):
            n += len(line.get_xdata())
    for coll in ax.collections:
        offsets = coll.get_offsets()
        if getattr(coll, "get_sizes", None) is not None and len(coll.get_sizes()) and len(offsets):
            n += len(offsets)
    return n


def png_is_not_blank(path: str) -> bool:
    """More than 0.5 % of the pixels differ from the background, and the image is not one flat grey."""
    img = imread(path)[..., :3].mean(axis=-1)
    background = np.median(img)
    return bool(np.mean(np.abs(img - background) > 0.1) > 0.005 and img.std() > 0.02)


def figure_for(drawn: list, name: str):
    hits = [fig for fig, path in drawn if os.path.basename(path) == name or str(path).endswith(name)]
    assert hits, f"no figure saved as {name}; saved: {[os.path.basename(p) for _, p in drawn]}"
    return hits[-1]


def check_plot(drawn: list, path, *, points: int | None = None, min_points: int = 1, axes_with_data: int = 1):
    """The saved figure at ``path`` has labelled axes, the markers expected and a non-blank PNG."""
    path = str(path)
    fig = figure_for(drawn, os.path.basename(path))
    data_axes = [ax for ax in fig.axes if ax.has_data()]
    assert len(data_axes) >= axes_with_data, f"{path}: {len(data_axes)} axes with data"
    for ax in data_axes:
        assert ax.get_ylabel().strip(), f"{path}: an axes without a y label"
    assert any(ax.get_xlabel().strip() for ax in data_axes), f"{path}: no x label"
    n = sum(marker_points(ax) for ax in data_axes)
    if points is not None:
        assert n == points, f"{path}: {n} data markers drawn, expected {points}"
    assert n >= min_points, f"{path}: only {n} data markers drawn"
    assert png_is_not_blank(path), f"{path}: the image is blank"
    return fig
