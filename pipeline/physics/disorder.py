"""Disorder realisations: per-site scalar potentials and exchange fields for a device mesh.

Four kinds of disorder term are provided, each a frozen dataclass with a ``sample`` method:

* :class:`Anderson` -- uncorrelated onsite potential, uniform in ``[-U/2, U/2]``;
* :class:`SmoothPotential` -- a Gaussian-correlated potential landscape (charge puddles) with
  ``<V(r) V(r')> = amplitude^2 exp(-|r - r'|^2 / (2 xi^2))``;
* :class:`MagneticExchange` -- an exchange field coupling to spin, on every site or on dilute
  impurity sites, with a random in-plane azimuth and an aligned or random-sign z part;
* :class:`EdgeRoughness` -- the free (non-contact) edges eroded by a correlated depth profile,
  implemented as a hard-wall potential on the removed sites.

:func:`realise` adds up a sequence of terms for one realisation, :func:`conserves_sz` tells
whether the spin blocks stay decoupled, and :func:`describe` writes a methods sentence.

Reproducibility
---------------
Random numbers are not drawn from a sequential generator. Every number is a counter-based hash
(:func:`hash_uniform`) of the root seed, the term's stream number, the realisation index, an
internal sub-stream and the site's integer lattice tag ``(i, j)``. A realisation therefore does
not depend on the order in which sites are listed, on batching or worker count, or on which
other sites exist: the same tag gets the same number in any mesh that contains it. In
:func:`realise` the stream number of a term is its position in the sequence, so appending a term
leaves the earlier terms' realisations unchanged. The correlated terms inherit this property
exactly (the smooth potential at a site is a fixed-radius convolution of tag-keyed noise) up to
floating-point rounding of the FFT, below 1e-12 of the amplitude.

The mesh is any object with attributes ``tags`` ((n, 2) int), ``positions`` ((n, 2) nm, the
site centres ``((i + 1/2) a, (j + 1/2) a)``) and ``lattice_constant`` (``a``, nm), such as
:class:`pipeline.system.mesh.Mesh`.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import asdict, dataclass
from numbers import Integral, Real
from typing import Any, Literal, Union

import numpy as np
import shapely
from pydantic import BaseModel, ConfigDict, Field
from scipy.signal import fftconvolve
from shapely.geometry import LineString, MultiPolygon, Polygon

from pipeline.errors import ModelError
from pipeline.physics.bhz import exchange_matrices

__all__ = ['RANDOM_SCHEME_VERSION', 'DisorderSample', 'hash_uniform', 'hash_normal', 'Anderson', 'SmoothPotential', 'MagneticExchange', 'EdgeRoughness', 'DisorderTerm', 'DisorderKind', 'DISORDER_KINDS', 'build_term', 'term_to_dict', 'realise', 'conserves_sz', 'describe']

_MASK64 = (1 << 64) - 1

#: version of the random-number scheme (the hash, its key words and sub-streams, how each
#: disorder kind turns numbers into a sample). Raise it with any change that alters a single
#: realisation: a store written under another version is then refused on resume instead of
#: mixing samples of two schemes (pipeline.sweep.identity).
RANDOM_SCHEME_VERSION = 1

# splitmix64 constants (Steele, Lea, Flood, OOPSLA 2014); the finaliser is a bijection of
# uint64 with full avalanche, so chaining it over the key words gives independent streams.
_GOLDEN = np.uint64(0x9E3779B97F4A7C15)
_MIX1 = np.uint64(0xBF58476D1CE4E5B9)
_MIX2 = np.uint64(0x94D049BB133111EB)
_S30, _S27, _S31, _S11 = (np.uint64(s) for s in (30, 27, 31, 11))

# Domain separation of the hash kinds, so a uniform never equals a half of a normal pair.
_KIND_UNIFORM, _KIND_NORMAL_R, _KIND_NORMAL_PHI = 0x55, 0xA1, 0xA2

# Sub-streams used inside the terms (one per independent quantity of a site).
_SUB_OCCUPIED, _SUB_AZIMUTH, _SUB_SIGN = 0, 1, 2
_SUB_EDGE = 7

# Largest padded grid (points) a SmoothPotential may allocate: ~0.3 GB per float64 array.
_MAX_GRID_POINTS = 40_000_000

# The Gaussian kernels are cut at this many correlation lengths (weight < exp(-16) there).
_KERNEL_RADIUS_XI = 4.0


def _fmix64(x: np.ndarray) -> np.ndarray:
    """splitmix64 finaliser, vectorised over uint64 (wrap-around multiplication is intended)."""
    x = x ^ (x >> _S30)
    x = x * _MIX1
    x = x ^ (x >> _S27)
    x = x * _MIX2
    return x ^ (x >> _S31)


def _as_u64_word(value: int, what: str) -> np.uint64:
    """A Python or NumPy integer as one uint64 key word (two's complement for negatives)."""
    if isinstance(value, bool) or not isinstance(value, Integral):
        raise ModelError(
            f"{what} must be an integer, got {value!r}; pass a Python or NumPy int"
        )
    return np.uint64(int(value) & _MASK64)


def _as_u64_array(values: Any) -> np.ndarray:
    """Integer tags as uint64; negative tags map to their two's complement (bijective)."""
    arr = np.asarray(values)
    if arr.dtype.kind not in "iu":
        raise ModelError(
            f"lattice tags must be integers, got an array of dtype {arr.dtype!r}; pass the "
            "integer site tags (i, j), not positions"
        )
    return arr.astype(np.int64, copy=False).view(np.uint64) if arr.dtype.kind == "i" else (
        arr.astype(np.uint64, copy=False)
    )


def _hash_bits(
    seed: int, stream: int, realisation: int, kind: int, sub: int, i: Any, j: Any
) -> np.ndarray:
    """64 well-mixed bits per (seed, stream, realisation, kind, sub, i, j), broadcast over i, j."""
    with np.errstate(over="ignore"):
        h = _fmix64(_as_u64_word(seed, "seed") + _GOLDEN)
        for word in (
            _as_u64_word(stream, "stream"),
            _as_u64_word(realisation, "realisation"),
            np.uint64(kind),
            _as_u64_word(sub, "sub-stream"),
        ):
            h = _fmix64((h ^ word) + _GOLDEN)
        h = _fmix64((_as_u64_array(i) ^ h) + _GOLDEN)
        return _fmix64((_as_u64_array(j) ^ h) + _GOLDEN)


def _bits_to_unit(bits: np.ndarray) -> np.ndarray:
    """Top 53 bits as a double in [0, 1) (every value exactly representable)."""
    return (bits >> _S11).astype(np.float64) * 2.0**-53


def hash_uniform(
    seed: int, stream: int, realisation: int, i: Any, j: Any, *, sub: int = 0
) -> np.ndarray:
    """Uniform numbers in [0, 1) that are a pure function of their key.

    Parameters
    ----------
    seed, stream, realisation : int
        Root seed, stream (disorder term) and realisation index. Any integers; they enter the
        hash modulo 2**64.
    i, j : array_like of int
        Lattice tags (broadcast against each other); negative values are allowed.
    sub : int, optional
        Sub-stream for a second independent quantity of the same site and term.

    Returns
    -------
    numpy.ndarray
        ``float64`` array of the broadcast shape of ``i`` and ``j``.
    """
    return _bits_to_unit(_hash_bits(seed, stream, realisation, _KIND_UNIFORM, sub, i, j))


def hash_normal(
    seed: int, stream: int, realisation: int, i: Any, j: Any, *, sub: int = 0
) -> np.ndarray:
    """Standard normal numbers that are a pure function of their key (Box--Muller).

    The radius and the angle come from two hash sub-streams distinct from those of
    :func:`hash_uniform`, so normals and uniforms of the same key are independent.
    Parameters as for :func:`hash_uniform`.
    """
    u_r = _bits_to_unit(_hash_bits(seed, stream, realisation, _KIND_NORMAL_R, sub, i, j))
    u_phi = _bits_to_unit(_hash_bits(seed, stream, realisation, _KIND_NORMAL_PHI, sub, i, j))
    # 1 - u lies in (0, 1], so the logarithm is finite.
    return np.sqrt(-2.0 * np.log1p(-u_r)) * np.cos(2.0 * np.pi * u_phi)


def _check_number(owner: str, name: str, value: Any, *, minimum: float | None = None,
                  strict: bool = False, unit: str = "", fix: str = "") -> float:
    """``value`` as a finite float, at least (or, with ``strict``, above) ``minimum``."""
    if isinstance(value, bool) or not isinstance(value, Real) or not math.isfinite(value):
        raise ModelError(
            f"{owner}.{name} must be a finite number{unit}, got {value!r}; {fix or 'pass a float'}"
        )
    value = float(value)
    if minimum is not None and (value <= minimum if strict else value < minimum):
        relation = ">" if strict else ">="
        raise ModelError(
            f"{owner}.{name} must be {relation} {minimum:g}{unit}, got {value!r}; "
            f"{fix or f'pass a value {relation} {minimum:g}'}"
        )
    return value


def _mesh_arrays(mesh: Any) -> tuple[np.ndarray, np.ndarray, float]:
    """``(tags int64 (n, 2), positions float (n, 2), a)`` of a mesh-like object, checked."""
    try:
        tags, positions, a = mesh.tags, mesh.positions, mesh.lattice_constant
    except AttributeError:
        raise ModelError(
            f"disorder needs a mesh with attributes tags, positions and lattice_constant, got "
            f"{type(mesh).__name__!r}; pass a pipeline.system.mesh.Mesh"
        ) from None
    a = _check_number("mesh", "lattice_constant", a, minimum=0.0, strict=True, unit=" nm")
    tags = np.asarray(tags)
    positions = np.asarray(positions, dtype=float)
    if tags.ndim != 2 or tags.shape[1] != 2 or tags.dtype.kind not in "iu":
        raise ModelError(
            f"mesh.tags must be an (n, 2) integer array, got shape {tags.shape!r} and dtype "
            f"{tags.dtype!r}; pass the integer lattice tags (i, j) of the sites"
        )
    if positions.shape != tags.shape:
        raise ModelError(
            f"mesh.positions must have the shape of mesh.tags {tags.shape!r}, got "
            f"{positions.shape!r}; pass one (x, y) position in nm per site"
        )
    tags = tags.astype(np.int64, copy=False)
    expected = (tags + 0.5) * a
    if len(tags) and not np.allclose(positions, expected, rtol=0.0, atol=1e-6 * a):
        k = int(np.argmax(np.abs(positions - expected).max(axis=1)))
        raise ModelError(
            f"mesh site {k} with tag {tuple(tags[k].tolist())!r} sits at "
            f"{tuple(positions[k].tolist())!r} nm, not at ((i + 1/2) a, (j + 1/2) a) = "
            f"{tuple(expected[k].tolist())!r} nm for a = {a!r} nm; build the mesh with "
            "pipeline.system.mesh.mesh_device so tags, positions and lattice constant agree"
        )
    return tags, positions, a


def _check_key(seed: Any, realisation: Any, stream: Any) -> None:
    for name, value in (("seed", seed), ("realisation", realisation), ("stream", stream)):
        if isinstance(value, bool) or not isinstance(value, Integral):
            raise ModelError(f"{name} must be an integer, got {value!r}; pass an int >= 0")
        if not 0 <= int(value) < 2**64:
            raise ModelError(
                f"{name} must lie in [0, 2**64), got {value!r}; pass a non-negative int"
            )


def _check_strength(strength: Any) -> float:
    return _check_number(
        "realise", "strength", strength, minimum=0.0,
        fix="disorder strength is a non-negative dimensionless multiplier (1 = as specified)",
    )


def _gaussian_kernel(xi_in_steps: float) -> np.ndarray:
    """1-D kernel whose autocorrelation is ``exp(-d^2 / (2 xi^2))`` (d, xi in grid steps).

    A Gaussian of standard deviation ``xi / sqrt 2`` convolved with itself is a Gaussian of
    standard deviation ``xi``. Normalised to unit sum of squares, so filtered unit white noise
    has unit variance exactly (in any dimension, for the separable product kernel).
    """
    radius = int(math.ceil(_KERNEL_RADIUS_XI * xi_in_steps))
    x = np.arange(-radius, radius + 1, dtype=float)
    w = np.exp(-(x**2) / xi_in_steps**2)  # = exp(-x^2 / (2 sigma^2)), sigma = xi / sqrt 2
    return w / math.sqrt(float(np.sum(w**2)))


def _refuse_subgrid_xi(owner: str, xi: float, a: float, fix: str) -> None:
    if xi < 0.5 * a:
        raise ModelError(
            f"{owner}.correlation_length = {xi!r} nm is below half the lattice constant "
            f"(a = {a!r} nm), which the lattice cannot resolve; {fix}"
        )


@dataclass(frozen=True, eq=False)
class DisorderSample:
    """One realisation of one disorder term on a mesh.

    Parameters
    ----------
    potential : numpy.ndarray
        Scalar onsite potential (meV), shape (n,); zeros when the term has none.
    exchange : numpy.ndarray or None
        Exchange field ``(m_x, m_y, m_z)`` (meV), shape (n, 3); None when the term has none.
    walled : numpy.ndarray or None
        Boolean mask (n,) of the sites removed by a hard wall (edge roughness), else None.

    Notes
    -----
    The arrays are stored read-only, so a sample cannot be changed after it is drawn.
    """

    potential: np.ndarray
    exchange: np.ndarray | None = None
    walled: np.ndarray | None = None

    def __post_init__(self) -> None:
        potential = np.array(self.potential, dtype=float)
        if potential.ndim != 1:
            raise ModelError(
                f"DisorderSample.potential must have shape (n,), got {potential.shape!r}; "
                "pass one potential (meV) per site"
            )
        potential.setflags(write=False)
        object.__setattr__(self, "potential", potential)
        if self.exchange is not None:
            exchange = np.array(self.exchange, dtype=float)
            if exchange.shape != (len(potential), 3):
                raise ModelError(
                    f"DisorderSample.exchange must have shape {(len(potential), 3)!r}, got "
                    f"{exchange.shape!r}; pass one (m_x, m_y, m_z) in meV per site or None"
                )
            exchange.setflags(write=False)
            object.__setattr__(self, "exchange", exchange)
        if self.walled is not None:
            walled = np.array(self.walled, dtype=bool)
            if walled.shape != potential.shape:
                raise ModelError(
                    f"DisorderSample.walled must have shape {potential.shape!r}, got "
                    f"{walled.shape!r}; pass one bool per site or None"
                )
            walled.setflags(write=False)
            object.__setattr__(self, "walled", walled)

    def onsite_extra(self, strength: float = 1.0) -> np.ndarray | None:
        """Exchange coupling matrices ``strength * m . s`` per site, shape (n, 4, 4), or None.

        Parameters
        ----------
        strength : float, optional
            Multiplier of the exchange field.

        Returns
        -------
        numpy.ndarray or None
            Complex (n, 4, 4) matrices in the basis (E up, H up, E down, H down), or None when
            the term has no exchange field.
        """
        if self.exchange is None:
            return None
        return exchange_matrices(float(strength) * self.exchange)


def _empty_like(n: int) -> np.ndarray:
    return np.zeros(n, dtype=float)


@dataclass(frozen=True)
class Anderson:
    """Uncorrelated onsite potential, uniform in ``[-U/2, U/2]`` on every site.

    Parameters
    ----------
    width : float
        ``U`` in meV (>= 0). The potential has variance ``U^2 / 12``.
    """

    width: float

    def __post_init__(self) -> None:
        _check_number("Anderson", "width", self.width, minimum=0.0, unit=" meV",
                      fix="pass the full width U >= 0 of the uniform distribution in meV")

    def sample(self, mesh: Any, *, seed: int, realisation: int, stream: int,
               strength: float = 1.0, outline: Any = None, contacts: Sequence = ()
               ) -> DisorderSample:
        """Draw the potential for one realisation.

        Parameters
        ----------
        mesh : Mesh-like
            Object with ``tags``, ``positions`` and ``lattice_constant``.
        seed, realisation, stream : int
            Root seed, realisation index and stream number (non-negative).
        strength : float, optional
            Multiplier of the potential (>= 0).
        outline, contacts
            Ignored (accepted so every term has the same call signature).

        Returns
        -------
        DisorderSample
        """
        _check_key(seed, realisation, stream)
        strength = _check_strength(strength)
        tags, _, _ = _mesh_arrays(mesh)
        u = hash_uniform(seed, stream, realisation, tags[:, 0], tags[:, 1])
        return DisorderSample(potential=strength * self.width * (u - 0.5))


@dataclass(frozen=True)
class SmoothPotential:
    """Gaussian-correlated potential landscape ("charge puddles").

    ``<V(r) V(r')> = amplitude^2 exp(-|r - r'|^2 / (2 xi^2))`` with zero mean.

    Parameters
    ----------
    amplitude : float
        rms value in meV (>= 0).
    correlation_length : float
        ``xi`` in nm (> 0); at sampling it must be at least half the lattice constant.

    Notes
    -----
    Tag-keyed Gaussian white noise on the rectangle of tags covering the sites, padded by
    ``ceil(4 xi / a)`` sites on each side, is convolved with a separable Gaussian kernel of
    standard deviation ``xi / sqrt 2`` cut at ``4 xi`` and normalised to unit sum of squares, so
    the field has variance ``amplitude^2`` exactly and the stated correlation function (up to
    lattice discretisation, which matters only for ``xi`` close to ``a``). Since the kernel has
    a fixed radius, the value at a site depends only on the noise within that radius, i.e. only
    on its tag and the key, not on the device shape.
    """

    amplitude: float
    correlation_length: float

    def __post_init__(self) -> None:
        _check_number("SmoothPotential", "amplitude", self.amplitude, minimum=0.0,
                      unit=" meV", fix="pass the rms amplitude >= 0 in meV")
        _check_number("SmoothPotential", "correlation_length", self.correlation_length,
                      minimum=0.0, strict=True, unit=" nm",
                      fix="pass a positive correlation length in nm")

    def sample(self, mesh: Any, *, seed: int, realisation: int, stream: int,
               strength: float = 1.0, outline: Any = None, contacts: Sequence = ()
               ) -> DisorderSample:
        """Draw the potential for one realisation (parameters as :meth:`Anderson.sample`).

        Raises
        ------
        ModelError
            If ``correlation_length < a / 2`` or the padded grid would be too large.
        """
        _check_key(seed, realisation, stream)
        strength = _check_strength(strength)
        tags, _, a = _mesh_arrays(mesh)
        xi = float(self.correlation_length)
        _refuse_subgrid_xi("SmoothPotential", xi, a,
                           "use Anderson disorder for a correlation length below the lattice "
                           "constant, or refine the lattice")
        n = len(tags)
        if n == 0 or self.amplitude == 0.0 or strength == 0.0:
            return DisorderSample(potential=_empty_like(n))
        kernel = _gaussian_kernel(xi / a)
        pad = (len(kernel) - 1) // 2
        lo = tags.min(axis=0) - pad
        hi = tags.max(axis=0) + pad
        shape = tuple(int(s) for s in hi - lo + 1)
        if shape[0] * shape[1] > _MAX_GRID_POINTS:
            raise ModelError(
                f"SmoothPotential with correlation_length = {xi!r} nm on a device spanning "
                f"{tuple((hi - lo + 1 - 2 * pad).tolist())!r} sites at a = {a!r} nm needs a "
                f"padded noise grid of {shape!r} points, more than {_MAX_GRID_POINTS}; use a "
                "shorter correlation length, a coarser lattice or a smaller device"
            )
        ii = np.arange(lo[0], hi[0] + 1, dtype=np.int64)[:, None]
        jj = np.arange(lo[1], hi[1] + 1, dtype=np.int64)[None, :]
        noise = hash_normal(seed, stream, realisation, ii, jj)
        # "valid" keeps exactly the points whose full kernel lies in the padded box: the
        # rectangle of tags spanned by the sites.
        field = fftconvolve(noise, kernel[:, None], mode="valid", axes=0)
        field = fftconvolve(field, kernel[None, :], mode="valid", axes=1)
        local = tags - (lo + pad)
        values = field[local[:, 0], local[:, 1]]
        return DisorderSample(potential=strength * self.amplitude * values)


@dataclass(frozen=True)
class MagneticExchange:
    """Exchange field coupling to spin: ``m . s`` on the same footing for E and H bands.

    Parameters
    ----------
    inplane : float, optional
        Magnitude (meV, >= 0) of the in-plane part; its azimuth is uniformly random per
        magnetic site. A non-zero in-plane part breaks S_z conservation.
    out_of_plane : float, optional
        z part (meV); its sign is the direction of the aligned moments.
    density : float or None, optional
        Magnetic impurities per nm^2 (> 0); each site is magnetic with probability
        ``density * a^2``, which must not exceed 1. None puts the field on every site.
    aligned : bool, optional
        True: the z part is ``out_of_plane`` on every magnetic site (ferromagnetic).
        False: its sign is random per site (paramagnetic, zero mean).
    """

    inplane: float = 0.0
    out_of_plane: float = 0.0
    density: float | None = None
    aligned: bool = True

    def __post_init__(self) -> None:
        _check_number("MagneticExchange", "inplane", self.inplane, minimum=0.0, unit=" meV",
                      fix="pass the magnitude >= 0 of the in-plane part; its direction is "
                          "random per site")
        _check_number("MagneticExchange", "out_of_plane", self.out_of_plane, unit=" meV")
        if self.density is not None:
            _check_number("MagneticExchange", "density", self.density, minimum=0.0,
                          strict=True, unit=" per nm^2",
                          fix="pass a positive impurity density in nm^-2, or None for a "
                              "field on every site")
        if not isinstance(self.aligned, (bool, np.bool_)):
            raise ModelError(
                f"MagneticExchange.aligned must be a bool, got {self.aligned!r}; pass True for "
                "a common z direction or False for a random sign per site"
            )

    def sample(self, mesh: Any, *, seed: int, realisation: int, stream: int,
               strength: float = 1.0, outline: Any = None, contacts: Sequence = ()
               ) -> DisorderSample:
        """Draw the exchange field for one realisation (parameters as :meth:`Anderson.sample`).

        Raises
        ------
        ModelError
            If ``density * a^2 > 1`` (more than one impurity per site).
        """
        _check_key(seed, realisation, stream)
        strength = _check_strength(strength)
        tags, _, a = _mesh_arrays(mesh)
        i, j = tags[:, 0], tags[:, 1]
        if self.density is None:
            magnetic = np.ones(len(tags), dtype=bool)
        else:
            p = float(self.density) * a * a
            if p > 1.0:
                raise ModelError(
                    f"MagneticExchange.density = {self.density!r} nm^-2 gives {p:.3g} "
                    f"impurities per site at a = {a!r} nm (at most 1 possible); use "
                    f"density <= 1/a^2 = {1.0 / (a * a):.4g} nm^-2, or density=None for a "
                    "field on every site"
                )
            magnetic = hash_uniform(seed, stream, realisation, i, j, sub=_SUB_OCCUPIED) < p
        phi = 2.0 * np.pi * hash_uniform(seed, stream, realisation, i, j, sub=_SUB_AZIMUTH)
        if self.aligned:
            sign = np.ones(len(tags))
        else:
            flip = hash_uniform(seed, stream, realisation, i, j, sub=_SUB_SIGN) < 0.5
            sign = np.where(flip, -1.0, 1.0)
        field = np.stack(
            [self.inplane * np.cos(phi), self.inplane * np.sin(phi), self.out_of_plane * sign],
            axis=1,
        )
        field[~magnetic] = 0.0
        return DisorderSample(potential=_empty_like(len(tags)), exchange=strength * field)


@dataclass(frozen=True)
class EdgeRoughness:
    """Free (non-contact) edges eroded by a Gaussian-correlated depth profile, as a hard wall.

    Parameters
    ----------
    amplitude : float
        rms of the depth profile (nm, >= 0); also its mean (see Notes).
    correlation_length : float
        Correlation length of the profile along the edge (nm, > 0; at sampling at least half
        the lattice constant).
    wall_potential : float, optional
        Onsite potential (meV, > 0) that removes a site. It must exceed every band energy of
        the model by far; the default 10^4 meV does for the usual BHZ parameters.

    Notes
    -----
    The free edges are the outline's rings (exterior and holes) minus the contact segments
    buffered by one lattice constant, so the lead interfaces stay clean. Along each ring, at
    arc length ``s`` from its first vertex, the erosion depth is
    ``depth(s) = strength * amplitude * (1 + g(s))`` clipped at 0, with ``g`` unit-variance
    Gaussian noise of correlation ``exp(-ds^2 / (2 xi^2))`` (periodic around the ring, keyed by
    the ring index: exterior 0, then the holes in order). Near a contact the depth is tapered
    linearly from 0 at one lattice constant from the contact to full over
    ``max(correlation_length, amplitude, a)`` along the edge, and sites within one lattice
    constant of a contact are never walled. A site is walled when its distance to the nearest
    point of a free edge is less than the depth there.

    The mean eroded edge therefore lies about ``amplitude`` inside the drawn outline (slightly
    more, as the clipping removes negative depths): to keep the mean width of a device, draw
    its outline wider by ``amplitude`` on each free edge. Strong erosion can pinch a narrow
    constriction off; :attr:`DisorderSample.walled` shows which sites were removed.

    The ``strength`` multiplier scales the depth profile, not the wall: at strength 0 no site
    is removed.
    """

    amplitude: float
    correlation_length: float
    wall_potential: float = 1.0e4

    def __post_init__(self) -> None:
        _check_number("EdgeRoughness", "amplitude", self.amplitude, minimum=0.0, unit=" nm",
                      fix="pass the rms depth >= 0 of the edge profile in nm")
        _check_number("EdgeRoughness", "correlation_length", self.correlation_length,
                      minimum=0.0, strict=True, unit=" nm",
                      fix="pass a positive correlation length along the edge in nm")
        _check_number("EdgeRoughness", "wall_potential", self.wall_potential, minimum=0.0,
                      strict=True, unit=" meV",
                      fix="pass a large positive potential (default 1e4 meV) that removes sites")

    def sample(self, mesh: Any, *, seed: int, realisation: int, stream: int,
               strength: float = 1.0, outline: Any = None, contacts: Sequence = ()
               ) -> DisorderSample:
        """Draw the eroded edges for one realisation.

        Parameters
        ----------
        mesh : Mesh-like
            Object with ``tags``, ``positions`` and ``lattice_constant``.
        seed, realisation, stream : int
            Root seed, realisation index and stream number (non-negative).
        strength : float, optional
            Multiplier of the depth profile (>= 0); the wall height is not scaled.
        outline : shapely.Polygon or shapely.MultiPolygon
            The drawn device outline (nm). Required.
        contacts : sequence of shapely.LineString or of objects with a ``segment``
            The contact segments on the outline (e.g. ``device.contacts``).

        Returns
        -------
        DisorderSample
            ``potential`` is ``wall_potential`` on walled sites and 0 elsewhere; ``walled``
            is the mask.

        Raises
        ------
        ModelError
            If the outline is missing or not a polygon, a contact is not a segment on it, or
            ``correlation_length < a / 2``.
        """
        _check_key(seed, realisation, stream)
        strength = _check_strength(strength)
        _, positions, a = _mesh_arrays(mesh)
        xi = float(self.correlation_length)
        _refuse_subgrid_xi("EdgeRoughness", xi, a,
                           "the edge profile cannot vary faster than the lattice; use a "
                           "correlation length >= a / 2 or refine the lattice")
        rings = _outline_rings(outline)
        segments = _contact_segments(contacts, outline, a)
        n = len(positions)
        walled = np.zeros(n, dtype=bool)
        peak = strength * self.amplitude
        if n == 0 or peak == 0.0:
            return DisorderSample(potential=_empty_like(n), walled=walled)

        contact_union = shapely.union_all(segments) if segments else None
        clean = shapely.buffer(contact_union, a) if segments else None
        taper_length = max(xi, float(self.amplitude), a)

        profiles = []
        for k, ring in enumerate(rings):
            free = ring.difference(clean) if clean is not None else ring
            if free.is_empty:
                continue
            grid, depth = _depth_profile(ring.length, a, xi, seed, stream, realisation, k)
            profiles.append((ring, free, grid, peak * np.clip(1.0 + depth, 0.0, None)))
        if not profiles:
            return DisorderSample(potential=_empty_like(n), walled=walled)

        max_depth = max(float(p[3].max()) for p in profiles)
        # Only sites within max_depth of the outline can be walled; a point-in-polygon test
        # against the shrunk outline is much cheaper than distances for the bulk sites. The
        # 1 % margin covers the polygonal approximation of the buffer's round corners.
        inner = outline.buffer(-1.01 * max_depth - 1e-9 * a)
        candidates = np.flatnonzero(~shapely.contains_xy(inner, positions[:, 0],
                                                         positions[:, 1]))
        points = shapely.points(positions[candidates])
        for ring, free, grid, depth in profiles:
            dist = shapely.distance(free, points)
            near = np.flatnonzero(dist < max_depth)
            if len(near) == 0:
                continue
            # The first vertex of the shortest line is the nearest point on the free edge.
            lines = shapely.shortest_line(free, points[near])
            foot = shapely.get_coordinates(lines)[0::2]
            foot_points = shapely.points(foot)
            s = shapely.line_locate_point(ring, foot_points)
            local = np.interp(s, grid, depth, period=ring.length)
            if contact_union is not None:
                to_contact = shapely.distance(contact_union, foot_points)
                local = local * np.clip((to_contact - a) / taper_length, 0.0, 1.0)
            walled[candidates[near]] |= dist[near] < local
        if contact_union is not None:
            # Sites bordering a lead's first cell keep the lead interface clean.
            walled[candidates] &= shapely.distance(contact_union, points) >= a
        potential = np.where(walled, float(self.wall_potential), 0.0)
        return DisorderSample(potential=potential, walled=walled)


def _outline_rings(outline: Any) -> list[LineString]:
    """Rings of a (multi)polygon as closed LineStrings: exterior, then holes, per polygon."""
    if outline is None:
        raise ModelError(
            "EdgeRoughness needs the device outline, got outline=None; pass "
            "outline=device.outline and contacts=device.contacts"
        )
    if isinstance(outline, Polygon):
        polygons = [outline]
    elif isinstance(outline, MultiPolygon):
        polygons = list(outline.geoms)
    else:
        raise ModelError(
            f"EdgeRoughness outline must be a shapely Polygon or MultiPolygon, got "
            f"{type(outline).__name__!r}; pass device.outline"
        )
    if outline.is_empty:
        raise ModelError(f"EdgeRoughness outline is empty: {outline.wkt!r}; pass device.outline")
    rings = []
    for poly in polygons:
        for ring in (poly.exterior, *poly.interiors):
            rings.append(LineString(ring.coords))
    return rings


def _contact_segments(contacts: Sequence, outline: Any, a: float) -> list[LineString]:
    """Contact segments as LineStrings, each checked to lie on the outline's boundary."""
    boundary = outline.boundary
    out = []
    for c in contacts:
        segment = getattr(c, "segment", c)
        if not isinstance(segment, LineString) or segment.is_empty:
            raise ModelError(
                f"EdgeRoughness contacts must be shapely LineStrings or Contact objects, got "
                f"{c!r}; pass contacts=device.contacts"
            )
        # A thin tube around the boundary tolerates rounding of the contact coordinates.
        tol = 1e-3 * a
        if segment.difference(boundary.buffer(tol)).length > tol:
            raise ModelError(
                f"contact segment {segment.wkt!r} does not lie on the outline; pass the "
                "contacts of the same device as the outline"
            )
        out.append(segment)
    return out


def _depth_profile(length: float, a: float, xi: float, seed: int, stream: int,
                   realisation: int, ring: int) -> tuple[np.ndarray, np.ndarray]:
    """Grid of arc lengths and unit Gaussian profile ``g`` (periodic) on one ring."""
    m = max(int(round(length / a)), 1)
    step = length / m
    kernel = _gaussian_kernel(xi / step)
    radius = (len(kernel) - 1) // 2
    # Fold the kernel onto the ring: a ring shorter than the kernel correlates with itself,
    # and re-normalising the folded kernel keeps the variance exactly 1.
    folded = np.bincount(np.arange(-radius, radius + 1) % m, weights=kernel, minlength=m)
    folded /= math.sqrt(float(np.sum(folded**2)))
    noise = hash_normal(seed, stream, realisation, np.int64(ring), np.arange(m, dtype=np.int64),
                         sub=_SUB_EDGE)
    g = np.fft.irfft(np.fft.rfft(noise) * np.fft.rfft(folded), n=m)
    return step * np.arange(m), g


#: Any of the disorder terms.
DisorderTerm = Union[Anderson, SmoothPotential, MagneticExchange, EdgeRoughness]
_TERM_TYPES = (Anderson, SmoothPotential, MagneticExchange, EdgeRoughness)


# --------------------------------------------------------------------------- the registry
class _Spec(BaseModel):
    """A ``[[disorder]]`` table of a sweep config (validated, frozen, no unknown keys)."""

    model_config = ConfigDict(extra="forbid", frozen=True)


class AndersonSpec(_Spec):
    kind: Literal["anderson"]
    #: width U of the uniform distribution [-U/2, U/2] (meV)
    width: float = Field(ge=0, le=5000)


class SmoothSpec(_Spec):
    kind: Literal["smooth"]
    #: rms amplitude (meV)
    amplitude: float = Field(ge=0, le=5000)
    #: Gaussian correlation length (nm)
    correlation_length: float = Field(gt=0, le=1e5)


class MagneticSpec(_Spec):
    kind: Literal["magnetic"]
    inplane: float = Field(default=0.0, ge=0, le=5000)
    out_of_plane: float = Field(default=0.0, ge=-5000, le=5000)
    #: magnetic impurities per nm^2 (omit for an exchange field on every site)
    density: float | None = Field(default=None, gt=0)
    aligned: bool = True


class RoughnessSpec(_Spec):
    kind: Literal["roughness"]
    #: rms depth of the edge profile (nm)
    amplitude: float = Field(ge=0, le=1e4)
    #: correlation length along the edge (nm)
    correlation_length: float = Field(gt=0, le=1e6)


@dataclass(frozen=True)
class DisorderKind:
    """One kind of disorder: its config name, its model class and its config table."""

    #: the value of ``kind`` in a config's ``[[disorder]]`` table
    name: str
    #: the frozen dataclass that samples it (its fields are the table's keys without ``kind``)
    model: type
    #: the pydantic model that validates the table
    spec: type[BaseModel]


#: every disorder kind, by config name. Adding a kind: its model class above, its spec class,
#: one entry here, its sentence in :func:`_describe_one`, and its tests. The config, the run
#: model, the segment pools and the methods text all read this table.
DISORDER_KINDS: dict[str, DisorderKind] = {
    k.name: k for k in (
        DisorderKind("anderson", Anderson, AndersonSpec),
        DisorderKind("smooth", SmoothPotential, SmoothSpec),
        DisorderKind("magnetic", MagneticExchange, MagneticSpec),
        DisorderKind("roughness", EdgeRoughness, RoughnessSpec),
    )
}


def build_term(spec: BaseModel | Mapping[str, Any]) -> DisorderTerm:
    """The disorder model of a config table (a spec, or a plain mapping with ``kind``).

    ``kind`` may be the config name (``"anderson"``) or the model's class name
    (``"Anderson"``, the form segment pools are stored with).
    """
    data = dict(spec.model_dump() if isinstance(spec, BaseModel) else spec)
    name = data.pop("kind", None)
    kind = DISORDER_KINDS.get(name) or next(
        (k for k in DISORDER_KINDS.values() if k.model.__name__ == name), None)
    if kind is None:
        raise ModelError(f"unknown disorder kind {name!r}; the kinds are "
                         f"{', '.join(DISORDER_KINDS)}")
    return kind.model(**data)


def term_to_dict(term: DisorderTerm) -> dict[str, Any]:
    """A JSON-able record of a disorder model (``kind`` is the class name), for stores."""
    return {"kind": type(term).__name__, **asdict(term)}


def _check_terms(terms: Sequence) -> list:
    terms = list(terms)
    for k, term in enumerate(terms):
        if not isinstance(term, _TERM_TYPES):
            raise ModelError(
                f"disorder term {k} is {term!r}, not a disorder term; use Anderson, "
                "SmoothPotential, MagneticExchange or EdgeRoughness from pipeline.physics.disorder"
            )
    return terms


def realise(terms: Sequence[DisorderTerm], mesh: Any, *, seed: int, realisation: int,
            strength: float = 1.0, outline: Any = None, contacts: Sequence = ()
            ) -> tuple[np.ndarray, np.ndarray | None]:
    """Total disorder of one realisation: scalar potential and exchange matrices per site.

    Parameters
    ----------
    terms : sequence of DisorderTerm
        The disorder terms; term ``k`` is drawn with stream ``k``, so appending a term does not
        change the realisations of the earlier ones.
    mesh : Mesh-like
        Object with ``tags``, ``positions`` and ``lattice_constant``.
    seed : int
        Root seed (>= 0).
    realisation : int
        Realisation index (>= 0).
    strength : float, optional
        Dimensionless multiplier (>= 0) of all terms. It scales potentials and exchange fields
        and, for :class:`EdgeRoughness`, the depth profile (never the wall height).
    outline, contacts : optional
        Device outline and contacts, needed by :class:`EdgeRoughness`.

    Returns
    -------
    potential : numpy.ndarray
        Total scalar potential (meV), shape (n,).
    onsite_extra : numpy.ndarray or None
        Total exchange coupling matrices (meV), shape (n, 4, 4), or None without exchange.
    """
    terms = _check_terms(terms)
    strength = _check_strength(strength)
    _check_key(seed, realisation, 0)
    tags, _, _ = _mesh_arrays(mesh)
    potential = np.zeros(len(tags))
    exchange = None
    for k, term in enumerate(terms):
        sample = term.sample(mesh, seed=seed, realisation=realisation, stream=k,
                             strength=strength, outline=outline, contacts=contacts)
        potential += sample.potential
        if sample.exchange is not None:
            exchange = sample.exchange.copy() if exchange is None else exchange + sample.exchange
    # exchange_matrices is linear, so one conversion of the summed field suffices.
    return potential, (None if exchange is None else exchange_matrices(exchange))


def conserves_sz(terms: Sequence[DisorderTerm]) -> bool:
    """True when no term mixes the spins (no in-plane exchange), so S_z blocks decouple.

    Parameters
    ----------
    terms : sequence of DisorderTerm

    Returns
    -------
    bool
    """
    return not any(
        isinstance(t, MagneticExchange) and t.inplane != 0.0 for t in _check_terms(terms)
    )


def _g(x: float) -> str:
    return f"{float(x):g}"


def _describe_one(term: DisorderTerm) -> str:
    if isinstance(term, Anderson):
        return (f"Anderson disorder of width U = {_g(term.width)} meV (onsite energies uniform "
                "in [-U/2, U/2])")
    if isinstance(term, SmoothPotential):
        return (f"a smooth Gaussian-correlated potential of rms amplitude {_g(term.amplitude)} "
                f"meV and correlation length {_g(term.correlation_length)} nm")
    if isinstance(term, MagneticExchange):
        where = ("on every site" if term.density is None
                 else f"on randomly placed magnetic impurities ({_g(term.density)} nm^-2)")
        parts = []
        if term.inplane:
            parts.append(f"an in-plane part of {_g(term.inplane)} meV in a random direction")
        if term.out_of_plane:
            if term.aligned:
                parts.append(f"an aligned out-of-plane part m_z = {_g(term.out_of_plane)} meV")
            else:
                parts.append(f"an out-of-plane part of +-{_g(abs(term.out_of_plane))} meV "
                             "with random sign per site")
        body = " and ".join(parts) if parts else "zero magnitude"
        return f"an exchange field {where} with {body}"
    return (f"edge roughness (the free edges eroded by a Gaussian-correlated depth profile of "
            f"rms {_g(term.amplitude)} nm and correlation length "
            f"{_g(term.correlation_length)} nm along the edge, as a hard wall of "
            f"{_g(term.wall_potential)} meV)")


def describe(terms: Sequence[DisorderTerm]) -> str:
    """One-sentence description of the disorder for a methods section.

    Parameters
    ----------
    terms : sequence of DisorderTerm

    Returns
    -------
    str
        E.g. ``"Disorder: Anderson disorder of width U = 20 meV (...); and ..."``.
    """
    terms = _check_terms(terms)
    if not terms:
        return "No disorder was included."
    parts = [_describe_one(t) for t in terms]
    body = parts[0] if len(parts) == 1 else "; ".join(parts[:-1]) + "; and " + parts[-1]
    return f"Disorder: {body}."
