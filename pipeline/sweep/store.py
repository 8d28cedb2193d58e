"""The sample store: one Zarr (v3) group per run holding every disorder sample.

Layout (``xarray.open_zarr(path)`` reads it; dims and units in attrs)::

    transmission  (realisation, geometry, disorder_strength, b_perp, gate_voltage, energy,
                   lead_to, lead_from)   float64   T[i, j]: from contact j to contact i
    modes         (..., lead)            int16     open modes per lead (0 until computed)
    measurements  (..., measurement)     float64   the requested R (h/e^2) and G (e^2/h)
    status        (realisation, ..., energy) int8  0 missing, 1 done, 2 failed
                                                   (the codes of :class:`SampleStatus`)
    requested_realisations  (geometry, ..., energy) int64   only in runs with a precision
                  target (:mod:`pipeline.precision`): realisations requested per point; the
                  samples at realisation >= the request stay missing and are not work left
    segments/     a sub-group of segment pools for edges beyond direct reach, written only
                  through :class:`SegmentPoolStore` (xarray's reader ignores it)

The dimensions ``lead_to``, ``lead_from`` and ``lead`` are the device's contacts (the names
are part of store format 1).

The group attribute ``format`` (``"helisweep-samples/1"``) names the layout and its version;
each session records the helisweep that wrote it. What changes the version, which versions
this helisweep reads and what it says about the others: :mod:`pipeline.sweep.storeformat`
(stores of another version are refused before compute, naming the version that can use them).

Words: a *sample* is one realisation at one sweep point; a *block* is the realisations solved
together as one Dask task. Chunks hold one block (``realisation_block`` realisations, see the
attributes; enough for about eight samples) at one geometry and disorder strength, all field,
gate and energy points. Every chunk carries a CRC32C checksum (a Zarr v3 codec), so a
damaged chunk raises on read instead of being averaged silently. Chunks are written by
Zarr's local store through a temporary file and a rename, and a block's ``status`` is written
after its data, so a killed run leaves complete blocks or missing ones, never half-written
ones; failure reasons go to the group attributes.

Stores never hold executable content: plain numeric and string arrays and JSON attributes
(no pickle codecs, no object arrays).
"""

from __future__ import annotations

import shutil
import warnings
from dataclasses import dataclass
from enum import IntEnum
from pathlib import Path

import numpy as np
import zarr
from zarr.codecs import Crc32cCodec, ZstdCodec
from zarr.errors import ZarrUserWarning

from pipeline import __version__
from pipeline.errors import StoreError
from pipeline.sweep.config import AXES, SweepConfig, config_hash
from pipeline.sweep.identity import STORE_LAYOUT, describe_changes, identity_changes, run_identity
from pipeline.sweep.lock import StoreLock, check_unlocked
from pipeline.sweep.storeformat import check_readable, format_note, parse_format, resume_problem
from pipeline.timestamps import file_stamp, utc_now
from pipeline.transport.landauer import parse_measurement

__all__ = ['SampleStore', 'SWEEP_DIMS', 'REQUESTED', 'block_size', 'SampleStatus', 'RealisationSamples',
           'SegmentPoolStore']

SWEEP_DIMS = ("realisation",) + tuple(AXES)

#: the data variable of the realisations requested per sweep point (runs with a precision target)
REQUESTED = "requested_realisations"


class SampleStatus(IntEnum):
    """The one table of sample status codes (the ``status`` array of a store)."""

    MISSING = 0  #: not computed yet (or its chunk was damaged and will be recomputed)
    DONE = 1  #: computed and stored
    FAILED = 2  #: attempted; the reason is in the store's ``failures`` attribute


_FORMAT = STORE_LAYOUT


def _codecs():
    return [ZstdCodec(level=3), Crc32cCodec()]


def _consolidate(path: Path) -> None:
    """Consolidated metadata of the store at ``path`` (zarr writes files atomically)."""
    with warnings.catch_warnings():
        # consolidated metadata is a zarr-python extension of format 3, which is what
        # xarray reads first; the warning says so on every write
        warnings.simplefilter("ignore", ZarrUserWarning)
        zarr.consolidate_metadata(str(path))


def _resume_check(path: Path, cfg: SweepConfig, identity: dict, *,
                  fresh: bool = False) -> tuple[zarr.Group, list]:
    """Open an existing store and list how its identity differs from ``identity``.

    A sample store of another format version (:mod:`pipeline.sweep.storeformat`) is refused
    with what it is and what to do; with ``fresh`` it is listed as a changed
    ``store_layout`` instead, so that the caller moves it aside.
    """
    try:
        group = zarr.open_group(str(path), mode="r+", use_consolidated=False)
        old = dict(group.attrs)
    except Exception as exc:  # not a Zarr group at all
        raise StoreError(
            f"{str(path)!r} exists but is not a readable sample store ({exc}); move it "
            f"away or choose another run directory"
        ) from exc
    problem = resume_problem(old, path)  # raises for a store that is not a sample store
    if problem is not None:
        if not fresh:
            raise StoreError(problem)
        return group, [("store_layout", str(old.get("format")), _FORMAT)]
    recorded = dict(old.get("identity") or {})
    # a store from before identities were recorded: its config hash is all there is
    recorded.setdefault("config", str(old.get("config_hash")))
    return group, identity_changes(recorded, identity)


def _refusal(path: Path, cfg: SweepConfig, changes: list) -> str:
    return (f"the store {str(path)!r} holds samples of a different run: "
            f"{describe_changes(changes, cfg)}. Resuming would mix samples of two different "
            f"devices or models in one store. Restore what changed, choose another run "
            f"directory, or pass --fresh to move the old store aside (it is never deleted) and "
            f"start anew")


@dataclass
class SampleStore:
    """Handle on a run's Zarr group (see module docstring)."""

    path: Path
    group: zarr.Group
    #: the lock of a writing session (None when only reading)
    lock: StoreLock | None = None

    # ------------------------------------------------------------------ opening
    @classmethod
    def open_for_run(
        cls,
        path: str | Path,
        cfg: SweepConfig,
        contact_names: tuple[str, ...],
        *,
        provenance: dict,
        fresh: bool = False,
        n_workers: int = 1,
    ) -> "SampleStore":
        """Create the store, or reopen it to resume the same configuration.

        A store written by a different configuration is refused unless ``fresh`` is set;
        then the old store is moved aside (``samples.zarr.replaced-<time>``), never deleted.
        Raising the number of realisations grows the store; samples already there are kept.
        The store's lock (:mod:`pipeline.sweep.lock`) is taken first and held until
        :meth:`finish_session` (or :meth:`release_lock`): a second driver is refused.
        """
        path = Path(path)
        digest = config_hash(cfg)
        identity = run_identity(cfg)
        lock = StoreLock.acquire(path)  # one driver per store, from here to finish_session
        try:
            store = cls._open_locked(path, cfg, contact_names, digest, identity,
                                     provenance=provenance, fresh=fresh, n_workers=n_workers)
        except BaseException:
            lock.release()
            raise
        store.lock = lock
        return store

    @classmethod
    def _open_locked(cls, path: Path, cfg: SweepConfig, contact_names, digest: str,
                     identity: dict, *, provenance: dict, fresh: bool,
                     n_workers: int) -> "SampleStore":
        """:meth:`open_for_run` once the lock is held."""
        if path.exists():
            group, changes = _resume_check(path, cfg, identity, fresh=fresh)
            if changes:
                if not fresh:
                    raise StoreError(_refusal(path, cfg, changes))
                aside = path.with_name(path.name + ".replaced-" + file_stamp())
                shutil.move(str(path), str(aside))
            else:
                store = cls(path, group)
                if "identity" not in group.attrs:  # written before identities were recorded
                    group.attrs["identity"] = identity
                    group.attrs["identity_recorded_late"] = (
                        "identity first recorded on resume; the geometry file and material "
                        "numbers of earlier sessions were not checked")
                store._grow(cfg.run.realisations)
                store._log_session(provenance)
                store.consolidate()
                return store
        store = cls._create(path, cfg, contact_names, digest, provenance, n_workers)
        store.group.attrs["identity"] = identity
        store._log_session(provenance)
        store.consolidate()
        return store

    @staticmethod
    def check_resume(path: str | Path, cfg: SweepConfig, *, fresh: bool = False) -> None:
        """Refuse, before any compute, a store another live driver holds or that holds other
        samples.

        Nothing to do when ``path`` does not exist or ``fresh`` is set (the store is then
        moved aside when the run opens it); otherwise the store must be a sample store whose
        identity (:mod:`pipeline.sweep.identity`) equals that of ``cfg``.

        Raises
        ------
        StoreError
            Naming what changed (config, geometry file edited, material numbers, random-number
            scheme, store layout) and the fix.
        """
        path = Path(path)
        check_unlocked(path)  # another live driver: refused before a cluster starts
        if fresh or not path.exists():
            return
        _, changes = _resume_check(path, cfg, run_identity(cfg))
        if changes:
            raise StoreError(_refusal(path, cfg, changes))

    @classmethod
    def write_derived(cls, path: str | Path, ds, *, attrs: dict) -> "SampleStore":
        """Write samples computed in one go from other stored data as a store of this layout.

        The edge-network model (:mod:`pipeline.network`) samples whole devices from its
        stored segment pools; its samples are written here so that the summary, the figures
        and the package read them like a direct run's. Such a store is *derived*: it is
        rebuilt from the pools on every report, so a previous derived store at ``path`` is
        replaced (written beside it and renamed into place: a reader sees the old or the new
        one, never a mixture). A store of computed samples (a direct run) is never replaced.

        Parameters
        ----------
        path : str or Path
            Where the store goes.
        ds : xarray.Dataset
            ``transmission``, ``measurements``, ``status`` and ``modes`` with the store's
            dimensions, as NumPy arrays.
        attrs : dict
            Attributes to add (``config_hash``, ``config_text``, ``run_name``, ``root_seed``,
            ``model`` ...); ``format``, ``derived``, ``created`` and ``realisation_block`` are
            set here.

        Returns
        -------
        SampleStore

        Raises
        ------
        StoreError
            ``path`` holds something that is not a derived store.
        """
        path = Path(path)
        if path.exists():
            try:
                old = dict(zarr.open_group(str(path), mode="r", use_consolidated=False).attrs)
            except Exception:  # not a Zarr group
                old = {}
            if not parse_format(old.get("format")).is_samples or not old.get("derived"):
                raise StoreError(
                    f"{str(path)!r} exists and is not a derived sample store; it is never "
                    "replaced. Move it away or choose another run directory"
                )
        ds = ds.copy()
        ds.attrs = {**attrs, "format": _FORMAT, "derived": True, "created": utc_now(),
                    "realisation_block": int(ds.sizes["realisation"]),
                    "sessions": list(attrs.get("sessions", [])),
                    "failures": list(attrs.get("failures", []))}
        enc = {name: {"compressors": _codecs()} for name in ds.data_vars}
        work = path.with_name(f".{path.name}.partial-{file_stamp()}")
        path.parent.mkdir(parents=True, exist_ok=True)
        ds.to_zarr(str(work), mode="w-", encoding=enc, zarr_format=3, consolidated=False)
        _consolidate(work)
        if path.exists():
            aside = path.with_name(f".{path.name}.old-{file_stamp()}")
            path.rename(aside)
            work.rename(path)
            shutil.rmtree(aside, ignore_errors=True)
        else:
            work.rename(path)
        return cls(path, zarr.open_group(str(path), mode="r", use_consolidated=False))

    @classmethod
    def open(cls, path: str | Path, mode: str = "r") -> "SampleStore":
        """Open an existing store (``"r"``: to read; ``"r+"``: to change it).

        Parameters
        ----------
        path : str or Path
            The store (``<run directory>/samples.zarr``).
        mode : str
            ``"r"`` (default) or ``"r+"``.

        Returns
        -------
        SampleStore

        Raises
        ------
        StoreError
            No store there, not a helisweep sample store, a format version this helisweep
            does not read (newer, or older than any it knows) or, with ``"r+"``, one it does
            not write; the message says which helisweep can use it and what to do
            (:mod:`pipeline.sweep.storeformat`).
        """
        path = Path(path)
        if not path.exists():
            raise StoreError(f"no sample store at {str(path)!r}; run the sweep first")
        try:
            group = zarr.open_group(str(path), mode=mode, use_consolidated=False)
        except Exception as exc:  # not a Zarr group at all
            raise StoreError(
                f"{str(path)!r} is not a readable sample store ({type(exc).__name__}: {exc}); "
                f"give the path of a samples.zarr written by helisweep"
            ) from exc
        attrs = dict(group.attrs)
        check_readable(attrs, path)
        if mode != "r":
            problem = resume_problem(attrs, path)
            if problem is not None:
                raise StoreError(problem)
        return cls(path, group)

    @classmethod
    def _create(cls, path, cfg, contact_names, digest, provenance, n_workers=1) -> "SampleStore":
        import dask.array as da  # heavy: only where a cluster is used
        import xarray as xr  # heavy: only where datasets are built or read

        axes = cfg.axes
        nr = cfg.run.realisations
        sweep_shape = (nr,) + tuple(len(v) for v in axes.values())
        n = len(contact_names)
        labels = list(cfg.measure.labels)
        block = block_size(cfg, n_workers)
        task_chunk = (block, 1, 1) + sweep_shape[3:]
        coords = {"realisation": np.arange(nr, dtype=np.int64)}
        coords.update({k: np.asarray(v, dtype=float) for k, v in axes.items()})
        names = np.array(contact_names, dtype=object)
        coords.update({"lead_to": names, "lead_from": names, "lead": names,
                       "measurement": np.array(labels, dtype=object)})

        def lazy(shape, dtype, fill):
            return da.full(shape, fill, dtype=dtype, chunks=-1)

        dims = SWEEP_DIMS

        units = [parse_measurement(m).unit for m in labels]
        ds = xr.Dataset(
            {
                "transmission": (dims + ("lead_to", "lead_from"),
                                 lazy(sweep_shape + (n, n), "f8", np.nan),
                                 {"units": "1", "long_name": "transmission probability from lead_from to lead_to (diagonal: reflection)"}),
                "modes": (dims + ("lead",), lazy(sweep_shape + (n,), "i2", 0),
                          {"units": "1", "long_name": "open modes per lead"}),
                "measurements": (dims + ("measurement",), lazy(sweep_shape + (len(labels),), "f8", np.nan),
                                 {"long_name": "requested transport measurements", "units_by_measurement": units}),
                "status": (dims, lazy(sweep_shape, "i1", SampleStatus.MISSING),
                           {"long_name": "sample status", "flag_values": [int(s) for s in SampleStatus],
                            "flag_meanings": " ".join(s.name.lower() for s in SampleStatus)}),
            },
            coords=coords,
        )
        for k, unit in AXES.items():
            ds[k].attrs["units"] = unit
        ds["energy"].attrs["long_name"] = "Fermi energy"
        ds["gate_voltage"].attrs["long_name"] = "gate voltage"
        ds["b_perp"].attrs["long_name"] = "perpendicular magnetic field"
        ds["disorder_strength"].attrs["long_name"] = "disorder strength multiplier"
        ds["geometry"].attrs.update(
            long_name="swept geometry parameter",
            parameter=cfg.sweep.geometry.parameter if cfg.sweep.geometry else "",
        )
        enc = {
            "transmission": {"chunks": task_chunk + (n, n)},
            "modes": {"chunks": task_chunk + (n,)},
            "measurements": {"chunks": task_chunk + (len(labels),)},
            "status": {"chunks": task_chunk},
        }
        for v in enc.values():
            v["compressors"] = _codecs()
        ds.attrs.update(
            format=_FORMAT,
            config_hash=digest,
            config_text=cfg.source_text,
            run_name=cfg.run.name,
            root_seed=cfg.run.seed,
            realisation_block=block,
            created=utc_now(),
            sessions=[],
            failures=[],
        )
        path.parent.mkdir(parents=True, exist_ok=True)
        ds.to_zarr(str(path), mode="w-", compute=False, encoding=enc, zarr_format=3, consolidated=False)
        group = zarr.open_group(str(path), mode="r+", use_consolidated=False)
        return cls(path, group)

    def ensure_realisations(self, realisations: int) -> None:
        """Grow the realisation axis to at least ``realisations`` (new samples are missing);
        samples already stored are kept."""
        self._grow(int(realisations))

    def _grow(self, realisations: int) -> None:
        self.__dict__.pop("_arrays", None)
        have = self.group["realisation"].shape[0]
        if realisations <= have:
            return
        for name in ("transmission", "modes", "measurements", "status"):
            arr = self.group[name]
            arr.resize((realisations,) + arr.shape[1:])
        coord = self.group["realisation"]
        coord.resize((realisations,))
        coord[have:] = np.arange(have, realisations)

    def _log_session(self, provenance: dict) -> None:
        sessions = list(self.group.attrs.get("sessions", []))
        # the helisweep of each session: a store this version cannot use names the one that can
        sessions.append({"started": utc_now(), "helisweep": __version__, **provenance})
        self.group.attrs["sessions"] = sessions

    # ------------------------------------------------------------------ reading
    @property
    def shape(self) -> tuple[int, ...]:
        return tuple(self.group["status"].shape)

    def status(self) -> np.ndarray:
        """Status of every sample (see module docstring), shape of the sweep grid."""
        return self.group["status"][...]

    def requested(self) -> np.ndarray | None:
        """Realisations requested per sweep point (geometry, disorder_strength, b_perp,
        gate_voltage, energy), or None when the run has no precision target."""
        if REQUESTED not in self.group:
            return None
        return np.asarray(self.group[REQUESTED][...], dtype=np.int64)

    def requested_mask(self, requested: np.ndarray | None = None) -> np.ndarray | None:
        """Which samples (realisation, geometry, ..., energy) are requested: realisation index
        below the point's request; None when nothing limits the request."""
        requested = self.requested() if requested is None else np.asarray(requested)
        if requested is None:
            return None
        r = np.arange(self.shape[0]).reshape((-1,) + (1,) * requested.ndim)
        return r < requested[None]

    def write_requested(self, requested: np.ndarray, settings: dict) -> None:
        """Record the realisations requested per point and the settings that chose them.

        The realisation axis grows to the largest request first. The request is one chunk,
        written through a temporary file and a rename (Zarr's local store), so a kill leaves
        the previous decision or the new one. ``settings`` go to the attribute
        ``precision`` (JSON).

        Parameters
        ----------
        requested : numpy.ndarray of int
            Shape of the sweep grid (geometry, disorder_strength, b_perp, gate_voltage,
            energy), each value at least 1.
        settings : dict
            JSON-safe description of the precision target.
        """
        requested = np.asarray(requested, dtype=np.int64)
        if requested.shape != self.shape[1:] or (requested < 1).any():
            raise StoreError(f"requested realisations of shape {requested.shape} (smallest "
                             f"{requested.min() if requested.size else None}) do not fit the sweep "
                             f"grid {self.shape[1:]} with at least one realisation per point")
        self._grow(int(requested.max()))
        if REQUESTED not in self.group:
            arr = self.group.create_array(
                REQUESTED, shape=requested.shape, dtype="int64", chunks=requested.shape,
                fill_value=0, compressors=_codecs(), dimension_names=list(AXES),
                attributes={"long_name": "realisations requested per sweep point (precision "
                                         "target); samples at or above it are not part of the run",
                            "units": "1"})
        else:
            arr = self.group[REQUESTED]
        arr[...] = requested
        self.group.attrs["precision"] = settings
        self.consolidate()

    @property
    def block(self) -> int:
        """Realisations per block, i.e. per chunk and per task (fixed when the store is created)."""
        return int(self.group.attrs.get("realisation_block", 1))

    def pending_blocks(self, realisations: int | None = None, requested: np.ndarray | None = None,
                       ) -> list[tuple[tuple[int, int, int], list[int]]]:
        """Tasks still to do: ``((first realisation of the block, geometry, strength),
        [realisations of that block with a sample missing])``.

        Only requested samples count: those below ``realisations`` and, in a run with a
        precision target, below the point's request (``requested``, default the stored one).
        """
        st = self.status()
        missing = self._missing_work(st, requested)
        if realisations is not None:
            missing = missing[:realisations]
        missing = missing.reshape(missing.shape[:3] + (-1,)).any(axis=-1)
        b = self.block
        out = []
        for r0 in range(0, missing.shape[0], b):
            part = missing[r0:r0 + b]
            for g, s_ in np.argwhere(part.any(axis=0)):
                reals = [r0 + int(i) for i in np.flatnonzero(part[:, g, s_])]
                out.append(((r0, int(g), int(s_)), reals))
        return out

    def _missing_work(self, st: np.ndarray, requested: np.ndarray | None = None) -> np.ndarray:
        """Missing samples that are requested (all missing ones without a precision target)."""
        missing = st == SampleStatus.MISSING
        mask = self.requested_mask(requested)
        if mask is not None:
            missing &= mask[:st.shape[0]]
        return missing

    def counts(self) -> dict[str, int]:
        """Samples ``done``, ``failed``, ``missing`` (requested but not computed), and
        ``not_requested`` (missing beyond a point's request, precision runs only) of
        ``total``."""
        st = self.status()
        missing = int(self._missing_work(st).sum())
        unrequested = int((st == SampleStatus.MISSING).sum()) - missing
        return {"done": int((st == SampleStatus.DONE).sum()), "failed": int((st == SampleStatus.FAILED).sum()),
                "missing": missing, "total": int(st.size), "not_requested": unrequested}

    def verify(self) -> list[tuple[str, tuple[int, int, int], str]]:
        """Read every chunk and return the damaged ones as (array, block key, reason).

        Each chunk carries a CRC32C checksum, so a flipped bit or a truncated file fails to
        decode here instead of being averaged. Whole arrays are read first; only an array
        that fails is scanned chunk by chunk to say where.
        """
        damaged = []
        for name in ("status", "transmission", "modes", "measurements"):
            arr = self.group[name]
            try:
                arr[...]
                continue
            except Exception:  # noqa: BLE001 - any decode failure is a damaged chunk
                pass
            nr, ng, ns = arr.shape[:3]
            b = self.block
            for r0 in range(0, nr, b):
                for g, s_ in np.ndindex(ng, ns):
                    try:
                        arr[r0:r0 + b, g, s_]
                    except Exception as exc:  # noqa: BLE001
                        damaged.append((name, (r0, int(g), int(s_)),
                                        f"{type(exc).__name__}: {exc}"[:200]))
        return damaged

    def repair_for_resume(self) -> list[tuple[str, tuple[int, int, int], str]]:
        """Mark the blocks of damaged chunks as missing so a resumed run recomputes them.

        A damaged chunk's samples are already lost; recomputing them (the disorder is a
        function of seed and indices) restores exactly what was there. Returns what was found.
        """
        damaged = self.verify()
        if damaged:
            status = self.group["status"]
            b = self.block
            for _, (r0, g, s_), _ in damaged:
                region = status[r0:r0 + b, g, s_]
                status[r0:r0 + b, g, s_] = np.zeros_like(region)
            notes = list(self.group.attrs.get("repairs", []))
            notes += [{"array": n, "task": list(k), "reason": why, "when": utc_now()} for n, k, why in damaged]
            self.group.attrs["repairs"] = notes
        return damaged

    def report(self, max_failures: int = 10) -> str:
        """Human-readable status: done/total overall and per axis value, failures with reasons."""
        st = self.status()
        c = self.counts()
        lines = [f"{self.path}: {c['done']} done, {c['failed']} failed, {c['missing']} missing "
                 f"of {c['total']} samples ({len(self.pending_blocks())} blocks left)"]
        if c["not_requested"]:
            lines[0] += (f"; {c['not_requested']} beyond the points' requested realisations "
                         f"(precision target) are not part of the run")
        note = format_note(dict(self.group.attrs))
        if note:
            lines.append(note)
        for axis, name in enumerate(SWEEP_DIMS):
            if st.shape[axis] <= 1:
                continue
            values = self.group[name][...]
            other = tuple(i for i in range(st.ndim) if i != axis)
            done = (st == SampleStatus.DONE).sum(axis=other)
            total = np.prod([st.shape[i] for i in other])
            unit = self.group[name].attrs.get("units", "")
            cells = [f"{v:g}{(' ' + unit) if unit not in ('', '1') else ''}: {d}/{total}"
                     for v, d in zip(values, done)]
            if len(cells) > 12:
                cells = cells[:6] + ["..."] + cells[-5:]
            lines.append(f"  {name}: " + ", ".join(cells))
        failures = list(self.group.attrs.get("failures", []))
        current = [f for f in failures
                   if "retried" not in f and st[tuple(f["index"])] == SampleStatus.FAILED]
        if current:
            groups: dict[str, list] = {}
            for f in current:
                groups.setdefault(f["reason"], []).append(tuple(f["index"]))
            lines.append(f"  failed samples: {len(current)} in {len(groups)} group(s) by reason, "
                         f"index = ({', '.join(SWEEP_DIMS)}); `helisweep run --retry-failed` "
                         f"computes them again:")
            ordered = sorted(groups.items(), key=lambda kv: -len(kv[1]))
            for reason, where in ordered[:max_failures]:
                examples = ", ".join(str(w) for w in where[:3]) + (", ..." if len(where) > 3 else "")
                lines.append(f"    {len(where)} x {reason}  (e.g. {examples})")
            if len(ordered) > max_failures:
                lines.append(f"    ... and {len(ordered) - max_failures} more reason(s)")
        earlier = sum(1 for f in failures if "retried" in f)
        if earlier:
            lines.append(f"  {earlier} earlier failure(s) were retried (kept in the store's "
                         f"'failures' attribute as history)")
        return "\n".join(lines)

    # ------------------------------------------------------------------ writing
    def _array(self, name: str):
        """Array handle, opened once (looking it up in the group rereads its metadata)."""
        cache = self.__dict__.setdefault("_arrays", {})
        if name not in cache:
            cache[name] = self.group[name]
        return cache[name]

    def write_block(self, key: tuple[int, int, int], realisations: list[int],
                    results: list["RealisationSamples"]) -> None:
        """Write one finished task: the given realisations of the block starting at ``key[0]``.

        Whole chunks are written (one per array); samples of the block that were not
        recomputed keep their stored values. Status goes last, so a kill leaves the block
        missing, never half-written.
        """
        r0, g, s = key
        r1 = min(r0 + self.block, self.shape[0])
        rows = [r - r0 for r in realisations]
        names = ("transmission", "modes", "measurements", "status")  # RealisationSamples fields
        if len(rows) == r1 - r0:
            data = {n: np.stack([getattr(res, n) for res in results]) for n in names}
        else:  # part of the block is already stored: merge, do not overwrite it
            data = {n: self._array(n)[r0:r1, g, s] for n in names}
            for k, res in zip(rows, results):
                for n in names:
                    data[n][k] = getattr(res, n)
        for n in names[:-1]:
            self._array(n)[r0:r1, g, s] = data[n]
        failures = [{"index": [r, g, s, *idx], "reason": why}
                    for r, res in zip(realisations, results) for idx, why in res.failures]
        if failures:
            self.group.attrs["failures"] = list(self.group.attrs.get("failures", [])) + failures
        self._array("status")[r0:r1, g, s] = data["status"]

    def finish_session(self, summary: dict) -> None:
        sessions = list(self.group.attrs.get("sessions", []))
        if sessions:
            sessions[-1].update({"finished": utc_now(), **summary})
        self.group.attrs["sessions"] = sessions
        self.consolidate()
        self.release_lock()

    def retry_failed(self) -> int:
        """Mark every failed sample missing, so that this session computes it again.

        The failure records stay in the ``failures`` attribute, each marked with the session
        that retried it (``retried``); a sample that fails again gets a new record.

        Returns
        -------
        int
            Samples marked for another try.
        """
        st = self.group["status"]
        status = st[...]
        failed = status == SampleStatus.FAILED
        n = int(failed.sum())
        if n:
            status[failed] = SampleStatus.MISSING
            st[...] = status
            session = len(self.group.attrs.get("sessions", [])) - 1
            self.group.attrs["failures"] = [
                f if "retried" in f else {**f, "retried": session}
                for f in self.group.attrs.get("failures", [])]
            self.__dict__.pop("_arrays", None)
        return n

    def release_lock(self) -> None:
        """End this writing session's hold on the store (nothing when not holding it)."""
        if self.lock is not None:
            self.lock.release()
            self.lock = None

    def consolidate(self) -> None:
        """Rewrite the store's consolidated metadata (the root ``zarr.json``, written through a
        temporary file and a rename), so that ``xarray.open_zarr`` opens the store, finished or
        partial, in one read and without warnings. Called when a session opens the store (after
        any growth), when a precision decision adds or changes a variable and when a session
        finishes; chunk writes in between change no metadata."""
        _consolidate(self.path)
        self.group = zarr.open_group(str(self.path), mode="r+", use_consolidated=False)
        self.__dict__.pop("_arrays", None)


def block_size(cfg: SweepConfig, n_workers: int = 1) -> int:
    """Realisations per block (one task, one chunk): enough for ``execution.batch`` samples
    (default 8), so a sweep of one point per realisation does not pay the per-task overhead
    (scheduling, one chunk write per array) for every sample -- but small enough to leave
    about four tasks per worker for load balance. An explicit ``batch`` is taken as given."""
    points = int(np.prod([len(cfg.axes[k]) for k in ("b_perp", "gate_voltage", "energy")]))
    block = -(-(cfg.execution.batch or 8) // points)
    if not cfg.execution.batch:
        tasks_per_block = len(cfg.axes["geometry"]) * len(cfg.axes["disorder_strength"])
        balance = cfg.run.realisations * tasks_per_block // (4 * max(n_workers, 1))
        block = min(block, max(1, balance))
    return max(1, min(cfg.run.realisations, block))


@dataclass
class RealisationSamples:
    """The samples of one realisation at one geometry and strength, at every (field, gate,
    energy) point: what a worker ships back to the writer (small arrays)."""

    transmission: np.ndarray  # (nB, nV, nE, n, n)
    modes: np.ndarray  # (nB, nV, nE, n)
    measurements: np.ndarray  # (nB, nV, nE, m)
    status: np.ndarray  # (nB, nV, nE) int8
    failures: list  # [((b, v, e), reason)]
    seconds: float = 0.0


_SEGMENT_POOLS_FORMAT = "helisweep-segments/1"


@dataclass
class SegmentPoolStore:
    """The ``segments`` sub-group of a run's sample store, where the long-edge stage keeps
    its pools of disordered segments (xarray's reader of the samples ignores it).

    The group records the hash of what determines the pools (``segments_hash``); pools of a
    different model are refused, or moved aside (``segments-replaced-<time>`` inside the
    store, never deleted) when starting afresh. Each pool is a sub-group of :attr:`group`,
    written and read by :mod:`pipeline.longedges.storage`.
    """

    path: Path
    group: zarr.Group

    #: Name of the sub-group in the sample store.
    GROUP = "segments"

    @classmethod
    def open(cls, store_path: str | Path, digest: str, *, fresh: bool = False,
             config_text: str = "", create: bool = True,
             group: str = GROUP) -> "SegmentPoolStore":
        """Open (or create) the pools group of the sample store at ``store_path``.

        Parameters
        ----------
        store_path : str or Path
            The run's sample store (``<run>/samples.zarr``); created as a bare group when
            it does not exist yet.
        digest : str
            Hash of what determines the pools.
        fresh : bool, optional
            Move a group of a different hash aside instead of refusing it.
        config_text : str, optional
            The configuration's text, kept in the group's attributes.
        create : bool, optional
            Create the group if needed (default). False opens an existing group read-only
            and refuses a missing one: for reading pools without computing any.
        group : str, optional
            Name of the sub-group (default :attr:`GROUP`, the long-edge stage's pools).

        Returns
        -------
        SegmentPoolStore

        Raises
        ------
        StoreError
            The group holds pools of a different hash and ``fresh`` is not set.
        """
        root_path = Path(store_path)
        path = root_path / group
        if path.exists():
            old = zarr.open_group(str(path), mode="r", use_consolidated=False).attrs.get("segments_hash")
            if old != digest:
                if not (fresh and create):
                    raise StoreError(
                        f"{str(path)!r} holds segment pools of a different model (hash "
                        f"{str(old)[:12]} vs {digest[:12]}); choose another run directory or pass "
                        f"--fresh to move it aside"
                    )
                shutil.move(str(path), str(root_path / f"{group}-replaced-{file_stamp()}"))
        if not create:
            if not path.exists():
                raise StoreError(
                    f"no segment pools at {str(path)!r}; compute them with "
                    f"`helisweep report CONFIG --run` (or `helisweep run CONFIG`)"
                )
            return cls(path, zarr.open_group(str(path), mode="r", use_consolidated=False))
        root = zarr.open_group(str(root_path), mode="a")
        node = root.require_group(group)
        node.attrs.update(format=_SEGMENT_POOLS_FORMAT, segments_hash=digest,
                          config_text=config_text)
        return cls(path, node)

    def __contains__(self, name: str) -> bool:
        """Whether a pool of that name is stored."""
        return name in self.group
