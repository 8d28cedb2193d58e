"""What a sample store holds, exactly: its identity, checked before every resume.

The configuration hash (:func:`pipeline.sweep.config.config_hash`) covers what the config file
says. It cannot see what the config only points at or what the code supplies, and either can
change under an unchanged config: a geometry file edited in place, the numbers behind a material
preset, the random-number scheme, the store layout. The identity is one SHA-256 (or version)
per component::

    config           config_hash(cfg)        every key that shapes a sample
    geometry         SHA-256 of the geometry file's bytes ("template" for a parametric device;
                     the GDSII layer map is a config key, so "config" covers it)
    material         SHA-256 of the BHZ numbers actually used (preset resolved, overrides applied)
    random_scheme    RANDOM_SCHEME_VERSION of pipeline.physics.disorder
    store_layout     the store's format string (its version: :mod:`pipeline.sweep.storeformat`)

A store records its identity when created. A resume with any component different is refused
before compute, naming the component, what it was and what it is now, and the fix; ``--fresh``
moves the old store aside (never deletes it). Changes that only extend the ensemble (more
realisations, a precision target, new workers) are outside every component and keep working.
"""

from __future__ import annotations

import hashlib
import json
from dataclasses import asdict, is_dataclass
from pathlib import Path

from pipeline.errors import ConfigError
from pipeline.physics.disorder import RANDOM_SCHEME_VERSION
from pipeline.sweep.config import SweepConfig, config_hash
from pipeline.sweep.storeformat import STORE_FORMAT

__all__ = ['STORE_LAYOUT', 'IDENTITY_COMPONENTS', 'run_identity', 'identity_changes',
           'describe_changes', 'sha256_file']

#: format of the sample store's layout (also the store's ``format`` attribute); its version and
#: what changes it are in :mod:`pipeline.sweep.storeformat`
STORE_LAYOUT = STORE_FORMAT

#: the components, in the order they are reported
IDENTITY_COMPONENTS = ("config", "geometry", "material", "random_scheme", "store_layout")

_WHAT = {
    "config": "the configuration (a key that shapes the samples)",
    "geometry": "the geometry file's content",
    "material": "the material numbers used (a preset's values or an override)",
    "random_scheme": "the random-number scheme version of this helisweep",
    "store_layout": "the store layout version",
}


def sha256_file(path: str | Path) -> str:
    """SHA-256 of a file's bytes (hex), read in 1 MiB blocks."""
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        for block in iter(lambda: fh.read(1 << 20), b""):
            h.update(block)
    return h.hexdigest()


def _material_digest(cfg: SweepConfig) -> str:
    params = cfg.material.parameters()
    data = asdict(params) if is_dataclass(params) else dict(vars(params))
    numbers = {k: v for k, v in data.items() if isinstance(v, (int, float))}
    return hashlib.sha256(json.dumps(numbers, sort_keys=True).encode()).hexdigest()


def run_identity(cfg: SweepConfig) -> dict[str, str]:
    """The identity of the samples ``cfg`` produces (see the module docstring).

    Parameters
    ----------
    cfg : SweepConfig
        A validated configuration (its ``base_dir`` resolves a relative geometry path).

    Returns
    -------
    dict
        ``{component: digest or version}`` for every name in :data:`IDENTITY_COMPONENTS`.

    Raises
    ------
    ConfigError
        If the geometry file cannot be read.
    """
    if cfg.device.file is not None:
        path = Path(cfg.base_dir) / cfg.device.file
        try:
            geometry = sha256_file(path)
        except OSError as exc:
            raise ConfigError(f"the geometry file {str(path)!r} cannot be read ({exc}); check "
                              f"'device.file' (relative paths start at the config file)") from exc
    else:
        geometry = f"template {cfg.device.template}"
    return {"config": config_hash(cfg), "geometry": geometry, "material": _material_digest(cfg),
            "random_scheme": str(RANDOM_SCHEME_VERSION), "store_layout": STORE_LAYOUT}


def identity_changes(recorded: dict, current: dict) -> list[tuple[str, str, str]]:
    """The components whose recorded and current values differ.

    Parameters
    ----------
    recorded : dict
        The store's ``identity`` attribute (components missing from it are not compared: a
        store written before a component existed).
    current : dict
        :func:`run_identity` of the config that wants to resume.

    Returns
    -------
    list of (component, recorded, current)
    """
    return [(k, str(recorded[k]), str(current.get(k)))
            for k in IDENTITY_COMPONENTS if k in recorded and str(recorded[k]) != str(current.get(k))]


def describe_changes(changes: list[tuple[str, str, str]], cfg: SweepConfig) -> str:
    """A sentence per changed component: what changed, from what to what."""
    parts = []
    for name, old, new in changes:
        if name == "geometry" and cfg.device.file is not None:
            what = f"the geometry file {cfg.device.file!r} was edited"
        elif name == "random_scheme":
            what = f"{_WHAT[name]} changed ({old} -> {new})"
        else:
            what = f"{_WHAT[name]} changed"
        parts.append(f"{what} [{name}: {old[:12]} -> {new[:12]}]")
    return "; ".join(parts)
