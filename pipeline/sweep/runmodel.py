"""The run model: what a sweep config means in terms of the lower stages.

One place turns a :class:`~pipeline.sweep.config.SweepConfig` into domain objects: the device
at each point of the geometry axis (a template or a geometry file), the disorder models of its
``[[disorder]]`` tables (through the registry of :mod:`pipeline.physics.disorder`), the gate
potentials at a gate voltage, whether the spin blocks decouple, and the ideal quantum spin Hall
value of every measurement. The executor, the checks, the aggregation, the figures, the
package writer and the long-edge stage all ask here instead of repeating it.
"""

from __future__ import annotations

from pathlib import Path

from pipeline.device.outline import perimeter_order
from pipeline.device.readers import load_device
from pipeline.device.templates import TEMPLATES
from pipeline.errors import TransportError
from pipeline.physics.disorder import build_term, conserves_sz
from pipeline.sweep.config import SweepConfig
from pipeline.transport.landauer import helical_ring_transmissions, parse_measurement

__all__ = ['device_for', 'quantised_values', 'uses_spin_blocks', 'disorder_terms', 'gate_potentials']


# --------------------------------------------------------------------------- devices & systems
def device_for(cfg: SweepConfig, geometry_index: int):
    """The device at one point of the geometry axis (a template or a geometry file)."""

    dev = cfg.device
    if dev.file is not None:
        layer_map = {k: tuple(v) for k, v in dev.layer_map.items()} if dev.layer_map else None
        return load_device(Path(cfg.base_dir) / dev.file, layer_map=layer_map)
    params = dict(dev.parameters)
    if cfg.sweep.geometry is not None:
        params[cfg.sweep.geometry.parameter] = cfg.axes["geometry"][geometry_index]
    return TEMPLATES[dev.template](**params, name=cfg.run.name)


def quantised_values(cfg: SweepConfig, geometry_index: int = 0) -> dict[str, float]:
    """Ideal quantum spin Hall value of every requested measurement on the run's device.

    Computed by the same Landauer-Buttiker solver from ideal helical-edge transmissions
    (:func:`pipeline.transport.landauer.helical_ring_transmissions`), e.g. 2 e^2/h for a two-terminal
    strip and h/4e^2 for R14,23 on an H-bar. NaN where the ideal value is undefined.
    """

    device = device_for(cfg, geometry_index)
    T = helical_ring_transmissions(perimeter_order(device), len(device.contacts))
    out = {}
    for label in cfg.measure.labels:
        try:
            out[label] = float(parse_measurement(label).evaluate(T, device.contact_names))
        except TransportError:
            out[label] = float("nan")
    return out


def uses_spin_blocks(cfg: SweepConfig) -> bool:
    """True when the run's Hamiltonian conserves S_z and the reduction is not switched off.

    S_z is conserved without bulk-inversion asymmetry and without in-plane exchange (the
    field is perpendicular); then the spin-up and spin-down blocks are independent
    half-size problems (see :meth:`pipeline.system.mesh.DeviceSystem.block_params`).
    """

    return (cfg.execution.spin_blocks == "auto"
            and cfg.material.parameters().delta_bia == 0
            and conserves_sz(disorder_terms(cfg)))


def disorder_terms(cfg: SweepConfig) -> list:
    """The disorder models of the config's ``[[disorder]]`` tables, in order (see the registry
    :data:`pipeline.physics.disorder.DISORDER_KINDS`)."""
    return [build_term(term) for term in cfg.disorder]


def gate_potentials(cfg: SweepConfig, device, voltage: float) -> dict[str, float]:
    """Potential energy (meV) of each driven gate: U = -lever_arm * V_gate."""
    driven = cfg.gates.driven if cfg.gates.driven is not None else list(device.gate_names)
    return {g: -cfg.gates.lever_arm * voltage for g in driven}
