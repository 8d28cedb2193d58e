"""Edges of many segments: drawing random sequences from a pool and composing them.

An edge of length ``n l`` is a random sequence of ``n`` segments drawn with replacement from
a pool (:class:`~pipeline.longedges.pools.SegmentSet`), composed with the star product
(:mod:`pipeline.longedges.smatrix`):

* **coherently**, over the clean lead's propagating modes: the phase of every multiply
  reflected wave is kept, so interference (and with it localisation) is included;
* **incoherently**, over the mode-resolved probabilities ``|S_ij|^2``: full dephasing between
  segments, i.e. classical addition of the segments as series resistors channel by channel.

The draw is counter-based (segment ``j`` of sequence ``s`` is a hash of (seed, s, j)), so it
depends neither on the other lengths, the number of sequences, nor on batching. Results are
xarray datasets; :func:`lstar_dataset` recasts them for :mod:`pipeline.analysis.lstar`.

Units: lengths nm, energies meV, fields T, conductance e^2/h (the sum of ``|t|^2`` over all
modes, both spins: 2 for a clean strip in the gap).
"""

from __future__ import annotations

import json
import math
from collections.abc import Sequence

import numpy as np

from pipeline.errors import ModelError
from pipeline.longedges.pools import SegmentSet
from pipeline.longedges.smatrix import ProbabilityMatrix, SMatrix, star_product
from pipeline.physics.disorder import term_to_dict

__all__ = ["BATCH_BYTES", "draw_sequences", "compose_prefixes", "concatenated_conductance", "lstar_dataset"]

#: Memory (bytes) one batch of sequences may use while composing (the default of the
#: ``batch_bytes`` argument of :func:`concatenated_conductance`).
BATCH_BYTES = 256 * 2**20


def _check_counts(n_segments_per_edge) -> np.ndarray:
    """The requested edge lengths in segments as distinct positive int64, else ModelError."""
    counts = np.asarray(list(n_segments_per_edge))
    if counts.ndim != 1 or counts.size == 0 or not np.issubdtype(counts.dtype, np.integer) \
            or np.any(counts < 1):
        raise ModelError(
            f"n_segments_per_edge must be a non-empty sequence of positive integers, got "
            f"{n_segments_per_edge!r}"
        )
    if np.unique(counts).size != counts.size:
        raise ModelError(f"n_segments_per_edge repeats values: {counts.tolist()!r}")
    return counts.astype(np.int64)


_GOLDEN = np.uint64(0x9E3779B97F4A7C15)
_MIX1 = np.uint64(0xBF58476D1CE4E5B9)
_MIX2 = np.uint64(0x94D049BB133111EB)
_SEQUENCE_STREAM = np.uint64(0x5E9C)


def _mix64(x: np.ndarray) -> np.ndarray:
    """splitmix64 finaliser (Steele, Lea, Flood, OOPSLA 2014), element-wise on uint64."""
    x = x ^ (x >> np.uint64(30))
    x = x * _MIX1
    x = x ^ (x >> np.uint64(27))
    x = x * _MIX2
    return x ^ (x >> np.uint64(31))


def draw_sequences(seed: int, n_sequences: int, n_max: int, pool: int) -> np.ndarray:
    """Segment indices of every sequence, drawn with replacement.

    Index ``j`` of sequence ``s`` is a counter-based hash of (seed, s, j), so it does not
    depend on how many sequences or segments are drawn, nor on batching or workers. Shorter
    edges use the first ``n`` segments of each sequence (nested edges, as in a direct length
    sweep where a longer device contains the shorter one's disorder).

    Parameters
    ----------
    seed : int
        Seed of the draw.
    n_sequences, n_max : int
        Number of sequences and segments per sequence.
    pool : int
        Number of segments in the pool.

    Returns
    -------
    numpy.ndarray
        Integer indices into the pool, shape (n_sequences, n_max).
    """
    with np.errstate(over="ignore"):
        h = _mix64(np.array([int(seed)], dtype=np.uint64) * _GOLDEN + _SEQUENCE_STREAM)
        s = np.arange(n_sequences, dtype=np.uint64)[:, None]
        j = np.arange(n_max, dtype=np.uint64)[None, :]
        h = _mix64(h ^ (s * _GOLDEN + np.uint64(1)))
        h = _mix64(h ^ (j * _MIX1 + np.uint64(2)))
    u = (h >> np.uint64(11)).astype(np.float64) * 2.0**-53
    return np.minimum((u * pool).astype(np.int64), pool - 1)


def compose_prefixes(blocks: tuple, idx: np.ndarray, counts: np.ndarray, contacts) -> list:
    """Composed chains of the first ``n`` segments of each row of ``idx``, for each count.

    ``blocks`` are the pool's (r, t, tp, rp) arrays (pool, m, m); the chain is built from
    aligned power-of-two blocks, each composed as a balanced binary tree.
    """
    level = tuple(x[idx] for x in blocks)  # (batch, n_max, m, m)
    levels = [level]
    while level[0].shape[1] >= 2:
        h = level[0].shape[1] // 2
        level = star_product(tuple(x[:, 0:2 * h:2] for x in level),
                             tuple(x[:, 1:2 * h:2] for x in level))
        levels.append(level)
    out = []
    for n in counts:
        acc, start = None, 0
        for k in range(len(levels) - 1, -1, -1):
            if n & (1 << k):
                piece = tuple(x[:, start >> k] for x in levels[k])
                acc = piece if acc is None else star_product(acc, piece)
                start += 1 << k
        if contacts is not None:
            acc = star_product(star_product(contacts[0], acc), contacts[1])
        out.append(acc)
    return out


def _contact_blocks(segment_set: SegmentSet, coherent: bool):
    """Blocks of the doped contact sections (probabilities when incoherent), or None."""
    if segment_set.contact_left is None:
        return None
    res = []
    for c in (segment_set.contact_left, segment_set.contact_right):
        bl = (c.r, c.t, c.tp, c.rp)
        res.append(bl if coherent else tuple(np.abs(x) ** 2 for x in bl))
    return res


def _compose_all(segment_set, idx, counts, mode, pool_map=None, batch_bytes=BATCH_BYTES):
    """Conductance and composition error (length, sequence) of the drawn sequences."""
    coherent = mode == "coherent"
    blocks = (segment_set.r, segment_set.t, segment_set.tp, segment_set.rp)
    if not coherent:
        blocks = tuple(np.abs(x) ** 2 for x in blocks)
    contacts = _contact_blocks(segment_set, coherent)
    m = segment_set.n_modes
    per_seq = 2 * 4 * m * m * 16 * max(1, idx.shape[1]) * 3
    batch = max(1, int(batch_bytes) // per_seq)
    g = np.empty((counts.size, idx.shape[0]))
    err = np.empty_like(g)
    for lo in range(0, idx.shape[0], batch):
        rows = idx[lo:lo + batch]
        if pool_map is not None:
            rows = pool_map[rows]
        for i, res in enumerate(compose_prefixes(blocks, rows, counts, contacts)):
            if coherent:
                s = SMatrix(*res)
                g[i, lo:lo + batch] = s.conductance()
                err[i, lo:lo + batch] = s.unitarity_error()
            else:
                p = ProbabilityMatrix(*res)
                g[i, lo:lo + batch] = p.conductance()
                err[i, lo:lo + batch] = p.conservation_error()
    return g, err


def concatenated_conductance(
    segment_set: SegmentSet,
    n_segments_per_edge: Sequence[int],
    n_sequences: int,
    seed: int,
    mode: str = "coherent",
    *,
    pool_resamples: int = 0,
    batch_bytes: int = BATCH_BYTES,
):
    """Conductance of edges made of random sequences of segments from a pool.

    Parameters
    ----------
    segment_set : SegmentSet
        The pool.
    n_segments_per_edge : sequence of int
        Edge lengths in segments; the edge length is ``n * segment_length``.
    n_sequences : int
        Number of random sequences (edges) per length.
    seed : int
        Seed of the sequence draw: segment ``j`` of sequence ``s`` is drawn with replacement
        from the pool by a counter-based hash of (seed, s, j), so the draw does not depend on
        the other lengths, the number of sequences or batching; an edge of ``n`` segments is
        the first ``n`` of its sequence (nested edges, like a direct length sweep).
    mode : {"coherent", "incoherent"}
        Star product of amplitudes, or of probabilities ``|S_ij|^2`` (full dephasing between
        segments).
    pool_resamples : int, optional
        Bootstrap resamples of the pool for ``conductance_sem_pool`` (0: skip). Sequences
        share segments, so the plain standard error over sequences understates the
        uncertainty once ``n * n_sequences`` exceeds the pool; resampling the pool with
        replacement and recomposing gives the standard error of the mean including it.
    batch_bytes : int, optional
        Memory (bytes) one batch of sequences may use while composing; batching does not
        change the results (default :data:`BATCH_BYTES`).

    Returns
    -------
    xarray.Dataset
        ``conductance`` (length, sequence) in e^2/h; ``composition_error`` (length, sequence):
        ``||S^dagger S - 1||_2`` (coherent) or the largest violation of current conservation
        (incoherent); ``conductance_mean``, ``conductance_sem`` (plain) and, with
        ``pool_resamples``, ``conductance_sem_pool`` per length. Coordinates ``length`` (nm),
        ``n_segments``, ``sequence``. Attributes hold the model, ``quantised`` (the ideal
        value: the number of modes of the clean lead, 2 for the helical edges in the gap;
        doped contacts lower the clean value slightly by contact scattering) and
        ``evanescent_bound``.
    """
    counts = _check_request(segment_set, n_segments_per_edge, n_sequences, seed, mode,
                            pool_resamples)
    idx = draw_sequences(seed, int(n_sequences), int(counts.max()), segment_set.n_segments)
    g, err = _compose_all(segment_set, idx, counts, mode, batch_bytes=batch_bytes)
    data = _sequence_statistics(g, err, mode)
    if pool_resamples:
        data["conductance_sem_pool"] = (
            ("length",), _pool_bootstrap_sem(segment_set, idx, counts, mode, seed,
                                             int(pool_resamples), batch_bytes),
            {"units": "e^2/h",
             "long_name": "standard error of the mean from resampling the segment pool"})
    return _conductance_dataset(data, segment_set, counts, int(n_sequences), mode, seed, err)


def _check_request(segment_set, n_segments_per_edge, n_sequences, seed, mode,
                   pool_resamples) -> np.ndarray:
    """Validate a :func:`concatenated_conductance` request; returns the counts."""
    if mode not in ("coherent", "incoherent"):
        raise ModelError(f"mode must be 'coherent' or 'incoherent', got {mode!r}")
    if not isinstance(segment_set, SegmentSet):
        raise ModelError(f"segment_set must be a SegmentSet, got {type(segment_set).__name__!r}; "
                         "compute one with segment_smatrices or load_segments")
    counts = _check_counts(n_segments_per_edge)
    if not (isinstance(n_sequences, (int, np.integer)) and n_sequences >= 1):
        raise ModelError(f"n_sequences must be a positive integer, got {n_sequences!r}")
    if not (isinstance(seed, (int, np.integer)) and seed >= 0):
        raise ModelError(f"seed must be a non-negative integer, got {seed!r}")
    if not (isinstance(pool_resamples, (int, np.integer)) and pool_resamples >= 0):
        raise ModelError(f"pool_resamples must be an integer >= 0, got {pool_resamples!r}")
    return counts


def _sequence_statistics(g: np.ndarray, err: np.ndarray, mode: str) -> dict:
    """Data variables of the per-sequence results and their mean and plain standard error."""
    mean = g.mean(axis=1)
    if g.shape[1] > 1:
        sem = g.std(axis=1, ddof=1) / math.sqrt(g.shape[1])
    else:
        sem = np.full_like(mean, np.nan)
    return {
        "conductance": (("length", "sequence"), g,
                        {"units": "e^2/h", "long_name": "two-terminal conductance of the edge"}),
        "composition_error": (("length", "sequence"), err, {
            "units": "1", "long_name": ("||S^dagger S - 1||_2 of the composed S-matrix"
                                        if mode == "coherent" else
                                        "largest |sum of outgoing probabilities - 1|")}),
        "conductance_mean": (("length",), mean, {"units": "e^2/h"}),
        "conductance_sem": (("length",), sem, {
            "units": "e^2/h", "long_name": "standard error over sequences (ignores pool sharing)"}),
    }


def _pool_bootstrap_sem(segment_set, idx, counts, mode, seed, resamples, batch_bytes
                        ) -> np.ndarray:
    """Standard error of the mean per length from resampling the pool with replacement."""
    pool = segment_set.n_segments
    rng = np.random.default_rng(np.random.SeedSequence([int(seed), 0xB007]))
    means = np.empty((resamples, counts.size))
    for b in range(resamples):
        pool_map = rng.integers(0, pool, size=pool)
        gb, _ = _compose_all(segment_set, idx, counts, mode, pool_map=pool_map,
                             batch_bytes=batch_bytes)
        means[b] = gb.mean(axis=1)
    return means.std(axis=0, ddof=1)


def _conductance_dataset(data, segment_set, counts, n_sequences, mode, seed, err):
    """The dataset of :func:`concatenated_conductance` with its coordinates and attributes."""
    import xarray as xr  # heavy optional dependency, only needed for the result

    s = segment_set
    lengths = counts * s.segment_length
    ds = xr.Dataset(
        data,
        coords={"length": ("length", lengths.astype(float), {"units": "nm",
                                                              "long_name": "edge length n * l"}),
                "n_segments": ("length", counts),
                "sequence": np.arange(n_sequences)},
    )
    ds.attrs.update(
        # ideal: every mode of the clean lead transmitted
        mode=mode, seed=int(seed), n_pool=s.n_segments, quantised=float(s.n_modes),
        energy=s.energy, b_perp=s.b_perp, width=s.width,
        segment_length=s.segment_length, buffer=s.buffer,
        disordered_fraction=s.disordered_fraction,
        evanescent_length=s.evanescent_length,
        evanescent_bound=s.evanescent_bound,
        contact_doping=s.contact_doping,
        contact_length=(max(s.buffer_columns, 1) * s.lattice_constant
                        if s.contact_left is not None else 0.0),
        max_composition_error=float(np.max(err)),
        disorder=json.dumps([term_to_dict(t) for t in s.disorder]),
    )
    return ds


def lstar_dataset(ds, label: str = "G(L,R)"):
    """Recast :func:`concatenated_conductance` output in the layout :mod:`pipeline.analysis.lstar` reads.

    Parameters
    ----------
    ds : xarray.Dataset
        Output of :func:`concatenated_conductance` (or of
        :func:`pipeline.longedges.direct.direct_conductance` for
        several lengths, concatenated along ``length``).
    label : str, optional
        Measurement label to give the conductance.

    Returns
    -------
    xarray.Dataset
        ``measurements`` (realisation, geometry, measurement) with ``geometry`` the edge
        length (attribute ``parameter = "length"``) and ``quantised`` in the attributes; use
        ``pipeline.analysis.lstar.longest_ballistic_length(out, label, quantised=out.attrs["quantised"])``.
    """
    import xarray as xr  # heavy optional dependency, only needed for the result

    g = ds["conductance"].transpose("sequence" if "sequence" in ds.dims else "realisation",
                                    "length")
    out = xr.Dataset(
        {"measurements": (("realisation", "geometry", "measurement"),
                          np.asarray(g.values)[:, :, None])},
        coords={"realisation": np.arange(g.shape[0]),
                "geometry": ("geometry", np.asarray(ds["length"].values, dtype=float),
                             {"parameter": "length", "units": "nm"}),
                "measurement": np.array([label], dtype=object)},
    )
    out.attrs.update(ds.attrs)
    return out

