"""Drawing a device: outline with holes, contacts with their lead directions, gates and sites.

Figures are built on :class:`matplotlib.figure.Figure` objects (no pyplot state). The
Okabe-Ito palette here is the colour scheme of every figure of the project.
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np
from shapely.geometry import Polygon

from pipeline.device.outline import Device, polygon_pieces
from pipeline.errors import GeometryError

__all__ = ['plot_device', 'OKABE_ITO']

#: Okabe-Ito colour-blind-safe palette (yellow last: it is hard to see on a light background).
OKABE_ITO: tuple[str, ...] = (
    "#E69F00",  # orange
    "#56B4E9",  # sky blue
    "#009E73",  # bluish green
    "#D55E00",  # vermillion
    "#0072B2",  # blue
    "#CC79A7",  # reddish purple
    "#000000",  # black
    "#F0E442",  # yellow
)


def _polygon_path(poly: Polygon) -> Any:
    """A matplotlib compound Path of a polygon with its holes."""
    from matplotlib.path import Path  # heavy; only drawing needs it

    verts: list[np.ndarray] = []
    codes: list[np.ndarray] = []
    for ring in (poly.exterior, *poly.interiors):
        xy = np.asarray(ring.coords, dtype=float)[:, :2]
        c = np.full(len(xy), Path.LINETO, dtype=np.uint8)
        c[0], c[-1] = Path.MOVETO, Path.CLOSEPOLY
        verts.append(xy)
        codes.append(c)
    return Path(np.concatenate(verts), np.concatenate(codes))


def _draw_sites(ax: Any, sites: Any) -> None:
    xy = np.asarray(sites, dtype=float)
    if xy.ndim != 2 or xy.shape[1] != 2:
        raise GeometryError(
            f"sites must be an (N, 2) array of positions in nm, got shape {xy.shape!r}"
        )
    ms = 1.0 if len(xy) > 5000 else 2.0
    ax.plot(xy[:, 0], xy[:, 1], ".", ms=ms, color="#333333", alpha=0.6, zorder=2)


def _draw_gates(ax: Any, device: Device) -> None:
    """Hatched gate regions, each labelled with its name."""
    from matplotlib.colors import to_rgba  # heavy; only drawing needs it
    from matplotlib.patches import PathPatch  # heavy: drawing only

    for k, gate in enumerate(device.gates):
        colour = OKABE_ITO[(len(OKABE_ITO) - 3 - k) % len(OKABE_ITO)]
        for poly in polygon_pieces(gate.region):
            ax.add_patch(
                PathPatch(
                    _polygon_path(poly),
                    facecolor=to_rgba(colour, 0.25),
                    edgecolor=colour,
                    hatch="//",
                    lw=1.0,
                    zorder=3,
                )
            )
        if not gate.region.is_empty:
            p = gate.region.representative_point()
            ax.text(
                p.x,
                p.y,
                gate.name,
                color=colour,
                ha="center",
                va="center",
                fontsize=9,
                fontweight="bold",
                zorder=6,
                # A light backing keeps the name legible over dense site dots and hatching.
                bbox={"boxstyle": "round,pad=0.15", "fc": "white", "ec": "none", "alpha": 0.8},
            )


def _draw_contacts(ax: Any, device: Device, arrow: float) -> None:
    """Thick contact segments, an arrow along each lead's direction and the contact names."""
    for k, contact in enumerate(device.contacts):
        colour = OKABE_ITO[k % len(OKABE_ITO)]
        xy = np.asarray(contact.segment.coords, dtype=float)
        ax.plot(xy[:, 0], xy[:, 1], "-", lw=4, color=colour, solid_capstyle="butt", zorder=4)
        mx, my = contact.midpoint
        try:
            nx, ny = contact.normal
        except GeometryError:
            nx, ny = 0, 0  # a diagonal contact is still drawn, just without a lead arrow
        if (nx, ny) != (0, 0):
            ax.annotate(
                "",
                xy=(mx + nx * arrow, my + ny * arrow),
                xytext=(mx, my),
                arrowprops={"arrowstyle": "-|>", "color": colour, "lw": 1.5},
                zorder=5,
            )
        ax.text(
            mx + nx * 1.45 * arrow,
            my + ny * 1.45 * arrow,
            contact.name,
            color=colour,
            ha="center",
            va="center",
            fontsize=10,
            fontweight="bold",
            zorder=6,
        )


def plot_device(
    device: Device,
    ax: Any = None,
    sites: Any = None,
    lattice_constant: float | None = None,
) -> Any:
    """Draw a device: outline with holes, contacts with lead directions, gates, optional sites.

    Parameters
    ----------
    device : Device
        The device to draw.
    ax : matplotlib.axes.Axes, optional
        Axes to draw into; a new Figure (not registered with pyplot) is made if omitted.
    sites : array_like, shape (N, 2), optional
        Site positions in nm, drawn as small dots.
    lattice_constant : float, optional
        Shown in the title when given.

    Returns
    -------
    matplotlib.figure.Figure
        The figure holding the axes (save it with ``fig.savefig``; nothing is shown).
    """
    from matplotlib.figure import Figure  # heavy; only drawing needs it
    from matplotlib.patches import PathPatch  # heavy: drawing only

    if ax is None:
        fig = Figure(figsize=(6.4, 4.8), layout="constrained")
        ax = fig.add_subplot()
    else:
        fig = ax.figure

    outline = device.outline
    ax.add_patch(
        PathPatch(
            _polygon_path(outline), facecolor="#DDDDDD", edgecolor="#444444", lw=1.2, zorder=1
        )
    )
    minx, miny, maxx, maxy = outline.bounds
    diag = math.hypot(maxx - minx, maxy - miny) or 1.0
    arrow = 0.07 * diag  # lead-arrow length; labels and margins scale with it
    if sites is not None:
        _draw_sites(ax, sites)
    _draw_gates(ax, device)
    _draw_contacts(ax, device, arrow)

    pad = 1.8 * arrow
    ax.set_xlim(minx - pad, maxx + pad)
    ax.set_ylim(miny - pad, maxy + pad)
    ax.set_aspect("equal")
    ax.set_xlabel("x (nm)")
    ax.set_ylabel("y (nm)")
    title = device.name
    if lattice_constant is not None:
        title += f"  (a = {float(lattice_constant):g} nm)"
    if sites is not None:
        title += f"  {len(np.asarray(sites))} sites"
    ax.set_title(title)
    return fig
