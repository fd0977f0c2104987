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


def _missing_colour() -> str:
    from . import panels

    return panels.MISSING


def view_name(elev: float, azim: float) -> str:
    """Where the camera of a matplotlib 3D view sits, in words: "view from −y, above (+z)".

    Matplotlib places the eye along (cos e cos a, cos e sin a, sin e) for elevation e
    and azimuth a (``Axes3D.view_init``); the label names the dominant axis and
    whether the eye is above or below the x-y plane.
    """
    e, a = np.radians(elev), np.radians(azim)
    eye = np.array([np.cos(e) * np.cos(a), np.cos(e) * np.sin(a), np.sin(e)])
    k = int(np.argmax(np.abs(eye)))
    text = f"view from {'+' if eye[k] >= 0 else '−'}{'xyz'[k]}"
    if k != 2 and abs(elev) >= 5:
        text += f", {abs(elev):.0f}° {'above (+z)' if elev > 0 else 'below (−z)'}"
    return text


def _label_style(values: np.ndarray, label_names: dict | None):
    """Colours, norm and legend handles of a categorical (region) field: one swatch per region."""
    from matplotlib.colors import BoundaryNorm, ListedColormap
    from matplotlib.patches import Patch

    from . import panels

    present = sorted({int(v) for v in np.unique(values)})
    colours = [panels.LABEL_COLOURS[lab % len(panels.LABEL_COLOURS)] for lab in present]
    names = [(label_names or {}).get(lab, f"region {lab}") for lab in present]
    index = np.searchsorted(present, np.rint(values).astype(int))
    norm = BoundaryNorm(np.arange(len(present) + 1) - 0.5, len(present))
    handles = [Patch(facecolor=c, edgecolor="#555555", label=n) for c, n in zip(colours, names)]
    return ListedColormap(colours), norm, index, handles


def surface_figure(surface: Surface, values: np.ndarray, *, title: str, kind: str = "sequential",
                   unit: str = "", views: Sequence[tuple[float, float]] = ((15, -90), (15, 90)),
                   label_names: dict[int, str] | None = None):
    """Two views of a surface coloured by a per-vertex field (face colour = mean of its vertices).

    Each view is titled with its direction (:func:`view_name`).  Diverging fields use
    limits symmetric about zero, so white means no change; sequential fields run from
    their 1st to 99th percentile; region labels get one flat colour per triangle (the
    label of its first corner) and a legend with one swatch per region name.
    """
    from matplotlib.colors import Normalize
    from mpl_toolkits.mplot3d.art3d import Poly3DCollection

    plt = _plt()
    values = np.asarray(values, dtype=float)
    handles = None
    if kind == "labels":
        cmap, norm, index, handles = _label_style(values, label_names)
        face_values = index[surface.faces[:, 0]].astype(float)
    else:
        face_values = values[surface.faces].mean(axis=1)
        cmap = _cmap(kind)
        finite = values[np.isfinite(values)] if np.isfinite(values).any() else np.zeros(1)
        if kind == "diverging":
            m = float(np.percentile(np.abs(finite), 99)) or 1.0
            norm = Normalize(-m, m)
        else:
            lo, hi = np.percentile(finite, [1, 99])
            norm = Normalize(lo, hi if hi > lo else lo + 1)
        cmap = cmap.with_extremes(bad=_missing_colour())  # not measured (NaN): grey, in a legend
    fig = plt.figure(figsize=(4.2 * len(views) + 1.2, 3.8))
    v = surface.vertices - 0.5 * (surface.vertices.min(axis=0) + surface.vertices.max(axis=0))
    half = np.maximum(0.5 * np.ptp(v, axis=0), 1e-9 * max(float(np.ptp(v)), 1.0))
    for n, (elev, azim) in enumerate(views):
        ax = fig.add_subplot(1, len(views), n + 1, projection="3d")
        colours = cmap(norm(face_values))  # edges in the face colour: no seams between faces
        poly = Poly3DCollection(v[surface.faces], facecolors=colours, edgecolors=colours,
                                linewidths=0.3)
        ax.add_collection3d(poly)
        ax.set_xlim(-half[0], half[0]), ax.set_ylim(-half[1], half[1])
        ax.set_zlim(-half[2], half[2])
        ax.view_init(elev=elev, azim=azim)
        ax.set_axis_off()
        ax.set_box_aspect(tuple(half / half.max()))
        ax.set_title(view_name(elev, azim), fontsize=10, color="#3a4650")
    label = f"{title} ({unit})" if unit else title
    if handles is not None:
        fig.legend(handles=handles, title=label, loc="center right", frameon=False, fontsize=9)
    else:
        sm = plt.cm.ScalarMappable(norm=norm, cmap=cmap)
        fig.colorbar(sm, ax=fig.axes, shrink=0.7, pad=0.02).set_label(label)
        if not np.all(np.isfinite(face_values)):
            from matplotlib.patches import Patch

            fig.legend(handles=[Patch(facecolor=_missing_colour(), edgecolor="#555555",
                                      label="not measured")], loc="lower left", frameon=False,
                       fontsize=9)
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
