"""A device preview: validation, preflight report text and a drawing of outline and mesh."""

from __future__ import annotations

import warnings
from pathlib import Path

from pipeline.device.drawing import plot_device
from pipeline.device.outline import Device, validate_device
from pipeline.physics.materials import BHZParameters
from pipeline.system.mesh import mesh_device
from pipeline.system.preflight import preflight

__all__ = ["preview_device"]


def preview_device(device: Device, material: BHZParameters, a: float, out: Path, *,
                   check_half: bool = True, with_field: bool = False) -> str:
    """Validate, preflight and draw a device; returns the preflight report text.

    The figure (PNG at ``out`` and a PDF beside it) shows the outline, contacts, gates and
    the lattice sites. ``check_half`` also solves at ``a/2`` to report the discretisation
    error (slower). ``with_field`` (the run has a perpendicular field) also fixes the
    magnetic gauge, so contacts too close for it are refused with the fix.
    """
    from matplotlib.figure import Figure  # heavy: only when a figure is drawn

    validate_device(device, a)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # the warnings are part of the report text
        report = preflight(device, material, a, check_half=check_half, with_field=with_field)
    mesh = mesh_device(device, a)
    fig = Figure(figsize=(7, 5), layout="constrained")
    ax = fig.add_subplot()
    plot_device(device, ax=ax, sites=mesh.positions, lattice_constant=a)
    ax.set_title(f"{device.name}: {mesh.n_sites} sites, a = {a:g} nm (model estimate)")
    out = Path(out)
    out.parent.mkdir(parents=True, exist_ok=True)
    fig.savefig(out, dpi=150)
    fig.savefig(out.with_suffix(".pdf"))
    return report.text()
