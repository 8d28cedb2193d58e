"""Saving and loading segment pools in a Zarr (v3) group.

A pool is a sub-group (default name ``segments``) holding the S-matrix blocks, the Kwant
unitarity errors, the canonical mode basis and, with doped contacts, the contact sections,
with the pool's metadata (:meth:`~pipeline.longedges.pools.SegmentSet.metadata`) in its
attributes. Complex values are stored as float64 with a trailing (real, imag) axis, so the
pool holds only plain real arrays like the sample store, and every chunk carries a CRC32C
checksum. Disorder terms are written and rebuilt through the registry of
:mod:`pipeline.physics.disorder` (``term_to_dict`` / ``build_term``).

Inside a run directory the parent group is the ``segments`` group of the run's sample store,
opened through :class:`pipeline.sweep.store.SegmentPoolStore`.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np

from pipeline.errors import StoreError
from pipeline.longedges.modes import ModeBasis
from pipeline.longedges.pools import POOL_FORMAT, SegmentSet
from pipeline.longedges.smatrix import BLOCK_NAMES, SMatrix
from pipeline.physics.disorder import build_term
from pipeline.physics.materials import BHZParameters

__all__ = ["save_segments", "load_segments"]

# The arrays of the canonical basis, in the order of ModeBasis's fields.
_BASIS_FIELDS = ("right_wave", "right_momentum", "left_wave", "left_momentum", "right_sz",
                 "right_y", "left_sz", "left_y")


def _codecs():
    """Compression and a CRC32C checksum per chunk, as in the sample store."""
    from zarr.codecs import Crc32cCodec, ZstdCodec  # heavy optional dependency

    return [ZstdCodec(level=3), Crc32cCodec()]


def _open_group(zarr_group, mode: str):
    """The given group, or the Zarr v3 group at a path."""
    import zarr  # heavy optional dependency, only needed when given a path

    if isinstance(zarr_group, (str, Path)):
        return zarr.open_group(str(zarr_group), mode=mode, zarr_format=3)
    return zarr_group


def _put(group, name: str, data: np.ndarray, chunk0: int | None = None) -> None:
    """Write one array (complex as a trailing (real, imag) axis), chunked along axis 0."""
    data = np.asarray(data)
    if np.iscomplexobj(data):  # plain float64 with a trailing (real, imag) axis
        data = np.stack([data.real, data.imag], axis=-1)
    data = np.ascontiguousarray(data)
    chunks = data.shape if chunk0 is None or data.ndim == 0 else \
        (min(chunk0, max(data.shape[0], 1)),) + data.shape[1:]
    arr = group.create_array(name, shape=data.shape, dtype=data.dtype,
                             chunks=tuple(max(1, c) for c in chunks), compressors=_codecs())
    arr[...] = data


def _get(group, name: str, complex_valued: bool) -> np.ndarray:
    """Read one array written by :func:`_put`."""
    data = group[name][...]
    if complex_valued:
        if data.shape[-1:] != (2,):
            raise StoreError(f"array {name!r} of the segment pool has shape {data.shape!r}, "
                             "expected a trailing (real, imag) axis of length 2")
        return data[..., 0] + 1j * data[..., 1]
    return data


def save_segments(segment_set: SegmentSet, zarr_group, *, name: str = "segments",
                  overwrite: bool = False):
    """Store a segment pool in a sub-group of a Zarr v3 group.

    Parameters
    ----------
    segment_set : SegmentSet
    zarr_group : zarr.Group or str or Path
        The parent group, or a path opened with ``zarr.open_group(path, mode="a")``.
    name : str, optional
        Name of the sub-group.
    overwrite : bool, optional
        Replace an existing sub-group of that name (else :class:`StoreError`).

    Returns
    -------
    zarr.Group
        The sub-group: arrays ``r``, ``t``, ``tp``, ``rp`` (n_segments, m, m, 2),
        ``kwant_unitarity`` (n_segments,), the basis (``basis_right_wave`` (4 W/a, m, 2) ...),
        the contact blocks when doped (``contact_left_r`` ...), metadata in the attributes.
        Complex values are stored as float64 with a trailing (real, imag) axis, so the pool
        holds only plain real arrays like the sample store; every chunk carries a CRC32C
        checksum.
    """
    parent = _open_group(zarr_group, "a")
    if name in parent:
        if not overwrite:
            raise StoreError(
                f"the group already holds {name!r}; pass overwrite=True to replace it or choose "
                "another name"
            )
        del parent[name]
    g = parent.create_group(name)
    for k in BLOCK_NAMES:
        _put(g, k, getattr(segment_set, k), chunk0=4096)
    _put(g, "kwant_unitarity", segment_set.kwant_unitarity, chunk0=4096)
    for k in _BASIS_FIELDS:
        _put(g, f"basis_{k}", getattr(segment_set.basis, k))
    for side in ("left", "right"):
        c = getattr(segment_set, f"contact_{side}")
        if c is not None:
            for k in BLOCK_NAMES:
                _put(g, f"contact_{side}_{k}", getattr(c, k))
    g.attrs.update(segment_set.metadata(), complex_storage="trailing (real, imag) axis")
    return g


def load_segments(zarr_group, *, name: str = "segments") -> SegmentSet:
    """Read a segment pool written by :func:`save_segments`.

    Parameters
    ----------
    zarr_group : zarr.Group or str or Path
        The parent group (or its path).
    name : str, optional
        Name of the sub-group.

    Returns
    -------
    SegmentSet
    """
    parent = _open_group(zarr_group, "r")
    if name not in parent:
        raise StoreError(f"no segment pool {name!r} in the group; write one with save_segments")
    g = parent[name]
    meta = dict(g.attrs)
    if meta.get("format") != POOL_FORMAT:
        raise StoreError(f"group {name!r} is not a segment pool (format {meta.get('format')!r}, "
                         f"expected {POOL_FORMAT!r})")
    basis = ModeBasis(*(_get(g, f"basis_{k}", k.endswith("wave")) for k in _BASIS_FIELDS))
    return SegmentSet(
        *(_get(g, k, True) for k in BLOCK_NAMES), kwant_unitarity=g["kwant_unitarity"][...],
        basis=basis,
        material=BHZParameters(**meta["material"]), lattice_constant=meta["lattice_constant"],
        width=meta["width"], segment_length=meta["segment_length"], buffer=meta["buffer"],
        energy=meta["energy"], b_perp=meta["b_perp"],
        disorder=tuple(build_term(d) for d in meta["disorder"]),
        strength=meta["strength"], seed=meta["seed"],
        first_realisation=meta["first_realisation"], contact_doping=meta["contact_doping"],
        evanescent_length=meta["evanescent_length"], edge_decay_length=meta["edge_decay_length"],
        gauge_phase=meta["gauge_phase"], quarter_turns=int(meta.get("quarter_turns", 0)),
        created=meta.get("created", ""), **_read_contacts(g),
    )


def _read_contacts(g) -> dict:
    """The stored contact sections as ``SegmentSet`` keyword arguments (empty if undoped)."""
    contacts = {}
    for side in ("left", "right"):
        if f"contact_{side}_r" in g:
            contacts[f"contact_{side}"] = SMatrix(*(_get(g, f"contact_{side}_{k}", True)
                                                    for k in BLOCK_NAMES))
    return contacts
