"""Reading a run's samples for analysis: the store (checksums verified), its labels and ideal values.

Both the summary (:mod:`pipeline.analysis.summary`) and the L* estimate
(:mod:`pipeline.analysis.lstar`) start here, so they refuse the same damaged or foreign stores
with the same messages.
"""

from __future__ import annotations

import warnings
from collections.abc import Mapping, Sequence
from pathlib import Path

import numpy as np
import xarray as xr

from pipeline.errors import AggregateError, HelisweepError, SummaryWarning
from pipeline.sweep.config import parse_stored_config
from pipeline.sweep.runmodel import quantised_values
from pipeline.sweep.store import SampleStore

__all__ = ['open_samples', 'require_layout', 'measurement_labels', 'ideal_values']

#: how many damaged chunks an error message lists by name
_DAMAGED_SHOWN = 5


def open_samples(source) -> tuple[xr.Dataset, str]:
    """The samples as an xarray Dataset, and a description of where they came from.

    A store on disk is opened lazily after its chunk checksums are verified: damaged chunks
    must be recomputed, never averaged.

    Parameters
    ----------
    source : str, Path or xarray.Dataset
        A ``samples.zarr`` written by helisweep, or a Dataset with its layout (returned as
        it is).

    Returns
    -------
    ds : xarray.Dataset
    where : str
        The store's path, or ``"<in-memory dataset>"``.

    Raises
    ------
    AggregateError
        If there is no store, it is not a Zarr group, or a chunk fails its checksum.
    """
    if isinstance(source, xr.Dataset):
        return source, "<in-memory dataset>"
    path = Path(source)
    if not path.exists():
        raise AggregateError(
            f"no sample store at {str(path)!r}; run the sweep first (helisweep run CONFIG) or "
            f"give the path of an existing samples.zarr"
        )
    # first the store layer: a store of another format is refused with what it is and the fix
    store = SampleStore.open(path)
    try:
        ds = xr.open_zarr(str(path), consolidated=False)
    except Exception as exc:  # not a Zarr group
        raise AggregateError(
            f"{str(path)!r} cannot be read as a sample store ({type(exc).__name__}: {exc}); "
            f"give the path of a samples.zarr written by helisweep"
        ) from exc
    damaged = store.verify()
    if damaged:
        where = ", ".join(f"{n} task {k}" for n, k, _ in damaged[:_DAMAGED_SHOWN])
        more = ", ..." if len(damaged) > _DAMAGED_SHOWN else ""
        raise AggregateError(
            f"the store {str(path)!r} has {len(damaged)} damaged chunk(s) (checksum mismatch: "
            f"{where}{more}); they are not averaged. Rerun "
            f"`helisweep run` with the same config to recompute them, then aggregate again"
        )
    return ds, str(path)


def require_layout(ds: xr.Dataset, variables: Sequence[str], dims: Sequence[str]) -> None:
    """Refuse samples that lack a variable or a dimension of the store layout.

    Parameters
    ----------
    ds : xarray.Dataset
        The samples.
    variables, dims : sequence of str
        Names that must be present.

    Raises
    ------
    AggregateError
        Naming the first missing one and what the samples have instead.
    """
    for name in variables:
        if name not in ds.variables:
            raise AggregateError(
                f"the samples have no variable {name!r} (variables: "
                f"{sorted(map(str, ds.data_vars))!r}); give a store written by helisweep"
            )
    for name in dims:
        if name not in ds.dims:
            raise AggregateError(
                f"the samples have no dimension {name!r} (dims: {sorted(map(str, ds.dims))!r}); "
                f"give a store written by helisweep"
            )


def measurement_labels(ds: xr.Dataset) -> list[str]:
    """The measurement labels of the samples, in store order (e.g. ``["G(L,R)"]``)."""
    return [str(v) for v in np.asarray(ds["measurement"].values).tolist()]


def ideal_values(
    ds: xr.Dataset,
    labels: Sequence[str],
    override: Mapping[str, float] | None,
    config_dir: str | Path | None,
) -> np.ndarray:
    """Ideal quantum spin Hall value of each label at each geometry, shape (geometry, label).

    ``override`` wins; otherwise the values come from the store's configuration text through
    :func:`pipeline.sweep.runmodel.quantised_values`. Unavailable values are NaN (with a
    :class:`SummaryWarning` attributed to the caller's caller).

    Parameters
    ----------
    ds : xarray.Dataset
        The samples (their ``config_text`` attribute and ``geometry`` size are used).
    labels : sequence of str
        Measurement labels.
    override : mapping, optional
        ``{label: value}`` in the measurement's unit.
    config_dir : str or Path, optional
        Directory of the original config file (for geometry files given by relative path).

    Returns
    -------
    numpy.ndarray
    """
    n_geo = ds.sizes.get("geometry", 1)
    out = np.full((n_geo, len(labels)), np.nan)
    override = dict(override or {})
    unknown = sorted(set(override) - set(labels))
    if unknown:
        raise AggregateError(
            f"quantised values given for {unknown!r}, which the store does not measure "
            f"(measurements: {list(labels)!r}); use the measurement labels exactly"
        )
    need = [i for i, lab in enumerate(labels) if lab not in override]
    for i, lab in enumerate(labels):
        if lab in override:
            out[:, i] = float(override[lab])
    text = ds.attrs.get("config_text", "")
    if not need:
        return out
    if not text:
        warnings.warn(
            "the samples carry no configuration text, so the ideal (quantised) values of "
            f"{[labels[i] for i in need]!r} are unknown (NaN); pass quantised={{label: value}}",
            SummaryWarning, stacklevel=3,
        )
        return out
    try:
        cfg = parse_stored_config(text, source="<store config_text>", base_dir=config_dir or ".")
        per_geo = [quantised_values(cfg, g) for g in range(n_geo)]
    except HelisweepError as exc:
        warnings.warn(
            f"cannot rebuild the device from the store's configuration ({exc}); the quantised "
            f"values are NaN. If the device is a geometry file, pass config_dir= (the directory "
            f"of the original config file) or quantised={{label: value}}",
            SummaryWarning, stacklevel=3,
        )
        return out
    for g, values in enumerate(per_geo):
        for i in need:
            out[g, i] = values.get(labels[i], np.nan)
    return out
