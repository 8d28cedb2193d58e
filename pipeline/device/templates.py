"""Parametric device templates: a two-terminal strip, an H-bar and a six-terminal Hall bar.

Each template is a function of lengths in nm returning a :class:`~pipeline.device.outline.Device`
with its contacts numbered around the outline; :data:`TEMPLATES` maps the config's
``device.template`` names to them.
"""

from __future__ import annotations

import math
from collections.abc import Callable
from typing import Any

from shapely.geometry import LineString, Polygon

from pipeline.device.outline import Contact, Device
from pipeline.errors import GeometryError

__all__ = ['two_terminal_strip', 'h_bar', 'hall_bar', 'TEMPLATES']


def _length(name: str, value: Any) -> float:
    """A template length in nm: a positive finite number, or GeometryError."""
    try:
        v = float(value)
    except (TypeError, ValueError):
        v = float("nan")
    if isinstance(value, bool) or not (math.isfinite(v) and v > 0):
        raise GeometryError(f"{name} must be a positive length in nm, got {value!r}")
    return v


def _contact(name: str, p0: tuple[float, float], p1: tuple[float, float]) -> Contact:
    return Contact(name, LineString([p0, p1]))


def two_terminal_strip(length: float, width: float, name: str = "strip") -> Device:
    """A rectangular strip [0, length] x [0, width] with contacts on both ends.

    Parameters
    ----------
    length, width : float
        Size in nm.
    name : str, optional
        Device name.

    Returns
    -------
    Device
        Contacts ``"L"`` (x = 0, normal (-1, 0)) and ``"R"`` (x = length, normal (1, 0)).
    """
    L, W = _length("length", length), _length("width", width)
    outline = Polygon([(0, 0), (L, 0), (L, W), (0, W)])
    contacts = (_contact("L", (0, W), (0, 0)), _contact("R", (L, 0), (L, W)))
    return Device(name, outline, contacts)


def h_bar(
    length: float, width: float, arm_length: float, arm_width: float, name: str = "hbar"
) -> Device:
    """An H-shaped four-terminal device.

    Two vertical bars, each `arm_width` wide and ``2 * arm_length + width`` tall, joined by a
    horizontal bridge `length` long and `width` wide. The left bar spans
    ``x in [0, arm_width]``, the bridge ``y in [arm_length, arm_length + width]``.

    Parameters
    ----------
    length, width : float
        Bridge length (between the bars) and width, nm.
    arm_length : float
        How far each bar extends beyond the bridge, above and below, nm.
    arm_width : float
        Width of each vertical bar (and of its contacts), nm.
    name : str, optional
        Device name.

    Returns
    -------
    Device
        Contacts ``"1"`` (top-left end), ``"2"`` (bottom-left), ``"3"`` (bottom-right),
        ``"4"`` (top-right): a counter-clockwise walk of the perimeter meets 1, 2, 3, 4; the
        bridge's top edge joins 4 and 1, its bottom edge 2 and 3. Normals are (0, 1) at the top
        ends and (0, -1) at the bottom ends.
    """
    L, W = _length("length", length), _length("width", width)
    al, aw = _length("arm_length", arm_length), _length("arm_width", arm_width)
    H = 2 * al + W
    xr = aw + L  # left edge of the right bar
    outline = Polygon(
        [
            (0, 0), (aw, 0), (aw, al), (xr, al), (xr, 0), (xr + aw, 0), (xr + aw, H),
            (xr, H), (xr, al + W), (aw, al + W), (aw, H), (0, H),
        ]
    )  # fmt: skip
    contacts = (
        _contact("1", (aw, H), (0, H)),
        _contact("2", (0, 0), (aw, 0)),
        _contact("3", (xr, 0), (xr + aw, 0)),
        _contact("4", (xr + aw, H), (xr, H)),
    )
    return Device(name, outline, contacts)


def hall_bar(
    length: float,
    width: float,
    probe_width: float,
    probe_length: float,
    probe_spacing: float,
    name: str = "hallbar",
) -> Device:
    """A six-terminal Hall bar.

    The bar is [0, length] x [0, width] with current contacts on its ends; four probe arms,
    `probe_width` wide and `probe_length` long, leave the bottom and top edges centred at
    ``length/2 -+ probe_spacing/2``.

    Parameters
    ----------
    length, width : float
        Size of the bar, nm.
    probe_width, probe_length : float
        Width and length of each probe arm, nm.
    probe_spacing : float
        Centre-to-centre distance of the two probes on one edge, nm.
    name : str, optional
        Device name.

    Returns
    -------
    Device
        Contacts ``"1"`` (left end, full width), ``"2"``, ``"3"`` (bottom probes, left to
        right, normal (0, -1)), ``"4"`` (right end), ``"5"``, ``"6"`` (top probes, right to
        left, normal (0, 1)): a counter-clockwise walk of the perimeter meets 1 to 6 in order.

    Raises
    ------
    GeometryError
        If the probes would touch each other or reach past the ends of the bar.
    """
    L, W = _length("length", length), _length("width", width)
    pw, pl = _length("probe_width", probe_width), _length("probe_length", probe_length)
    s = _length("probe_spacing", probe_spacing)
    if s <= pw:
        raise GeometryError(
            f"probe_spacing {probe_spacing!r} nm must exceed probe_width {probe_width!r} nm, or "
            "the two probe arms on one edge touch; space them further apart or make them narrower"
        )
    if s + pw >= L:
        raise GeometryError(
            f"probe arms (spacing {probe_spacing!r} nm + width {probe_width!r} nm) do not fit "
            f"inside the bar length {length!r} nm; lengthen the bar or bring the probes closer"
        )
    c2, c3 = L / 2 - s / 2, L / 2 + s / 2
    h = pw / 2
    outline = Polygon(
        [
            (0, 0),
            (c2 - h, 0), (c2 - h, -pl), (c2 + h, -pl), (c2 + h, 0),
            (c3 - h, 0), (c3 - h, -pl), (c3 + h, -pl), (c3 + h, 0),
            (L, 0), (L, W),
            (c3 + h, W), (c3 + h, W + pl), (c3 - h, W + pl), (c3 - h, W),
            (c2 + h, W), (c2 + h, W + pl), (c2 - h, W + pl), (c2 - h, W),
            (0, W),
        ]
    )  # fmt: skip
    contacts = (
        _contact("1", (0, W), (0, 0)),
        _contact("2", (c2 - h, -pl), (c2 + h, -pl)),
        _contact("3", (c3 - h, -pl), (c3 + h, -pl)),
        _contact("4", (L, 0), (L, W)),
        _contact("5", (c3 + h, W + pl), (c3 - h, W + pl)),
        _contact("6", (c2 + h, W + pl), (c2 - h, W + pl)),
    )
    return Device(name, outline, contacts)


TEMPLATES: dict[str, Callable[..., Device]] = {
    "strip": two_terminal_strip,
    "hbar": h_bar,
    "hallbar": hall_bar,
}
