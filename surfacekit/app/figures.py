"""Static PNG figures (matplotlib, Agg backend) for printing alongside the HTML report."""
from __future__ import annotations

from collections.abc import Sequence

import numpy as np

from ..mesh.surface import Surface


def _plt():
    import matplotlib

    matplotlib.use("Agg", force=False)
    import matplotlib.pyplot as plt

    return plt


def _cmap(kind: str):
    from matplotlib.colors import LinearSegmentedColormap, ListedColormap

    from . import panels

    if kind == "labels":
        return ListedColormap(panels.LABEL_COLOURS)
    scale = {"diverging": panels.DIVERGING, "cyclic": panels.CYCLIC}.get(kind, panels.SEQUENTIAL)
    return LinearSegmentedColormap.from_list(f"sk_{kind}", [(p, c) for p, c in scale])


def surface_figure(surface: Surface, values: np.ndarray, *, title: str, kind: str = "sequential",
                   unit: str = "", views: Sequence[tuple[float, float]] = ((15, -90), (15, 90))):
    """Two views of a surface coloured by a per-vertex field (face colour = mean of its vertices).

    Diverging fields use limits symmetric about zero, so white means no change.
    """
    from matplotlib.colors import Normalize
    from mpl_toolkits.mplot3d.art3d import Poly3DCollection

    plt = _plt()
    values = np.asarray(values, dtype=float)
    face_values = values[surface.faces].mean(axis=1)
    if kind == "diverging":
        m = float(np.percentile(np.abs(values), 99)) or 1.0
        norm = Normalize(-m, m)
    elif kind == "labels":
        norm = Normalize(-0.5, 9.5)
    else:
        lo, hi = np.percentile(values, [1, 99])
        norm = Normalize(lo, hi if hi > lo else lo + 1)
    cmap = _cmap(kind)
    fig = plt.figure(figsize=(4.2 * len(views) + 0.8, 4.0))
    v = surface.vertices - surface.vertices.mean(axis=0)
    lim = float(np.abs(v).max())
    for n, (elev, azim) in enumerate(views):
        ax = fig.add_subplot(1, len(views), n + 1, projection="3d")
        poly = Poly3DCollection(v[surface.faces], facecolors=cmap(norm(face_values)),
                                edgecolors="none", linewidths=0)
        ax.add_collection3d(poly)
        ax.set_xlim(-lim, lim), ax.set_ylim(-lim, lim), ax.set_zlim(-lim, lim)
        ax.view_init(elev=elev, azim=azim)
        ax.set_axis_off()
        ax.set_box_aspect((1, 1, 1))
    sm = plt.cm.ScalarMappable(norm=norm, cmap=cmap)
    cbar = fig.colorbar(sm, ax=fig.axes, shrink=0.7, pad=0.02)
    cbar.set_label(f"{title} ({unit})" if unit else title)
    fig.suptitle(title)
    return fig


def histogram_figure(values: np.ndarray, *, title: str, unit: str = "", weights=None,
                     centre_zero: bool = False):
    """Histogram of a per-vertex field (area-weighted when `weights` are vertex areas)."""
    plt = _plt()
    values = np.asarray(values, dtype=float)
    fig, ax = plt.subplots(figsize=(5.2, 3.4))
    ax.hist(values, bins=40, weights=weights, color="#3b8c8c", edgecolor="white")
    if centre_zero:
        m = float(np.abs(values).max()) or 1.0
        ax.set_xlim(-m, m)
        ax.axvline(0.0, color="#1f2a33", lw=1)
    ax.set_xlabel(f"{title} ({unit})" if unit else title)
    ax.set_ylabel("area (mm²)" if weights is not None else "vertices")
    ax.set_title(title)
    fig.tight_layout()
    return fig


def bar_figure(names: Sequence[str], values: Sequence[float], *, title: str, unit: str = "",
               errors: Sequence[float] | None = None):
    """Bar chart of one number per region or group."""
    plt = _plt()
    fig, ax = plt.subplots(figsize=(5.2, 3.4))
    vals = np.asarray(values, dtype=float)
    colours = np.where(vals >= 0, "#c0583a", "#2f5f95")
    ax.bar(range(len(vals)), vals, yerr=errors, color=colours, capsize=3)
    ax.set_xticks(range(len(vals)), [str(n) for n in names], rotation=20, ha="right")
    ax.axhline(0.0, color="#1f2a33", lw=0.8)
    ax.set_ylabel(f"{title} ({unit})" if unit else title)
    ax.set_title(title)
    fig.tight_layout()
    return fig


def close(fig) -> None:
    """Free a figure's memory."""
    _plt().close(fig)
