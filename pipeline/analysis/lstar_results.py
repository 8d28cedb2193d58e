"""L* result types and the one ``lstar.json`` format that stores them.

:class:`LStarResult` is what every L* estimate produces (one measurement at one sweep point),
whether from a sweep of directly solved device lengths (:mod:`pipeline.analysis.lstar`) or
from concatenated edges (:mod:`pipeline.longedges.run`); :class:`LStarTable` collects the
results of all points. Both convert to plain data and back exactly (``to_dict`` /
``from_dict``).

On disk (``lstar.json`` of a length sweep, ``lstar-concatenated.json`` of concatenated
edges) the results are one JSON document::

    {"schema": "helisweep-lstar/2",
     "note": "<model-estimate note>",
     "results": [<LStarResult.to_dict()>, ...],
     "skipped": [{"measurement": ..., "point": {...}, "reason": ...}, ...]}

written by :func:`save_lstar` and read by :func:`load_lstar`. Each result says how it was
obtained (``method``) and at which sweep point (``point``). Schema 2 added the fits'
intervals, goodness-of-fit tests, the correlation between adjacent lengths and the
test-based ``preferred`` verdict; documents of schema ``helisweep-lstar/1`` still read (the
new entries take their defaults: NaN, empty). This module needs only NumPy,
so figures and packages can read L* results without loading the analysis.
"""

from __future__ import annotations

import json
import math
from collections.abc import Mapping
from dataclasses import MISSING, dataclass, field, fields
from pathlib import Path
from typing import Any

import numpy as np

from pipeline.errors import LStarError
from pipeline.jsonsafe import json_safe

__all__ = ['MODEL_NOTE', 'LSTAR_SCHEMA', 'LENGTH_SWEEP', 'concatenated_method', 'network_method',
           'Crossing',
           'FitResult', 'LStarResult', 'LStarTable', 'lstar_results', 'lstar_document',
           'save_lstar', 'load_lstar']

MODEL_NOTE = "model estimate from a simulated disorder ensemble, not a device certification"

#: ``schema`` entry of every L* JSON document; raise the number when the layout changes
LSTAR_SCHEMA = "helisweep-lstar/2"

#: earlier schemas that still read (their missing entries take the defaults)
_READABLE_SCHEMAS = ("helisweep-lstar/1", LSTAR_SCHEMA)

#: ``method`` of an L* from a sweep of directly solved device lengths
LENGTH_SWEEP = "length sweep"

#: composition modes of concatenated edges (pipeline.longedges.concat)
_CONCATENATION_MODES = ("coherent", "incoherent")


def concatenated_method(mode: str) -> str:
    """The ``method`` of an L* from concatenated edges composed in ``mode``.

    Parameters
    ----------
    mode : str
        ``"coherent"`` or ``"incoherent"``.

    Returns
    -------
    str
        ``"concatenated, coherent"`` or ``"concatenated, incoherent"``.
    """
    if mode not in _CONCATENATION_MODES:
        raise LStarError(f"composition mode {mode!r} is not one of {_CONCATENATION_MODES!r}; "
                         f"use the mode the edges were composed in")
    return f"concatenated, {mode}"


def network_method(composition: str) -> str:
    """The ``method`` of an L* from the helical-edge network model.

    Parameters
    ----------
    composition : str
        ``"coherent"`` or ``"incoherent"``: how segments are joined along an edge section.

    Returns
    -------
    str
        ``"edge network, coherent"`` or ``"edge network, incoherent"``.
    """
    if composition not in _CONCATENATION_MODES:
        raise LStarError(f"composition {composition!r} is not one of {_CONCATENATION_MODES!r}")
    return f"edge network, {composition}"


# --------------------------------------------------------------------------- results
@dataclass(frozen=True)
class Crossing:
    """Where a mean curve first leaves the tolerance band around 1.

    Attributes
    ----------
    length : float
        The crossing length (nm), or the bound (see ``kind``).
    kind : str
        ``"interpolated"`` (inside the swept range), ``"lower_bound"`` (never leaves the band:
        L* >= ``length``, the longest swept length) or ``"upper_bound"`` (already outside at
        the shortest length: L* <= ``length``).
    """

    length: float
    kind: str


@dataclass(frozen=True)
class FitResult:
    """One fitted form (lengths in nm).

    Attributes
    ----------
    form : str
        ``"incoherent"`` (<t> = 1/(1 + L/lambda)) or ``"coherent"`` (<ln t> = -L/xi).
    parameter : str
        ``"lambda"`` or ``"xi"``.
    value, error : float
        Fitted length and its standard error (nm): 1/rate of the GLS rate and the delta-method
        error se(rate)/rate^2 (see :mod:`pipeline.analysis.lstar_fits`). Documents of schema
        ``helisweep-lstar/1`` hold the former independent-lengths fit here.
    chi2_reduced : float
        ``chi2 / dof``.
    dof : int
        Degrees of freedom of the goodness-of-fit test: lengths tested minus one.
    n_points : int
        Lengths used by the fit.
    lstar, lstar_error : float
        Length where the fitted mean reaches 1 - tolerance, and its error (nm).
    tolerance : float
        The tolerance used for ``lstar``.
    ok : bool
        Whether the fit converged to a positive length with a finite error.
    message : str
        Why not, when ``ok`` is false.
    value_ci_low, value_ci_high : float
        Interval of the fitted length at level ``confidence`` (``interval_method``); the upper
        end is inf when the data do not exclude an infinite length (written ``"inf"`` in
        JSON). NaN when not computed (e.g. documents of schema ``helisweep-lstar/1``).
    lstar_ci_low, lstar_ci_high : float
        The same interval for ``lstar``.
    confidence : float
        Level of the intervals.
    interval_method, fit_method, test : str
        How the interval, the fit and the goodness-of-fit test were done.
    realisations : int
        Realisations used (usable at every length used).
    shrinkage : float
        Shrinkage intensity of the correlation matrix (0: sample covariance, 1: diagonal).
    chi2 : float
        Generalised chi^2 r^T (S/n)^-1 r of the residual contrasts (Hotelling's T^2).
    p_value : float
        Its p-value (``test``); a small value rejects the form.
    """

    form: str
    parameter: str
    value: float
    error: float
    chi2_reduced: float
    dof: int
    n_points: int
    lstar: float
    lstar_error: float
    tolerance: float
    ok: bool
    message: str = ""
    value_ci_low: float = math.nan
    value_ci_high: float = math.nan
    lstar_ci_low: float = math.nan
    lstar_ci_high: float = math.nan
    confidence: float = math.nan
    interval_method: str = ""
    fit_method: str = ""
    realisations: int = 0
    shrinkage: float = math.nan
    chi2: float = math.nan
    p_value: float = math.nan
    test: str = ""

    def __post_init__(self):
        _canonical_nan(self)

    def to_dict(self) -> dict:
        """This fit as JSON-safe plain data (NaN becomes None, an unbounded interval end
        ``"inf"``).

        Returns
        -------
        dict
            One key per attribute; :meth:`from_dict` reads it back.
        """
        d = {f.name: getattr(self, f.name) for f in fields(self)}
        for name in ("value_ci_high", "lstar_ci_high"):
            if d[name] == math.inf:
                d[name] = "inf"
        return json_safe(d)

    @classmethod
    def from_dict(cls, data: Mapping) -> FitResult:
        """The fit written by :meth:`to_dict` (None reads back as NaN).

        Parameters
        ----------
        data : mapping
            Output of :meth:`to_dict`, e.g. read from JSON.

        Returns
        -------
        FitResult
        """
        return cls(**_read_fields(cls, data, "a fit (FitResult.to_dict())"))


@dataclass(frozen=True)
class LStarResult:
    """L* of one measurement at one sweep point (a model estimate; lengths in nm).

    Attributes
    ----------
    measurement, kind : str
        The label and ``"G"`` or ``"R"``.
    quantised : float
        Ideal value used for the normalisation (unit of the measurement).
    tolerance : float
        Relative tolerance of the direct criterion and of the fitted L*.
    point : tuple of (str, float)
        Coordinates of the sweep point (disorder_strength, b_perp, gate_voltage, energy).
    length_parameter : str
        The swept template parameter.
    lengths : tuple of float
        Swept lengths, ascending (nm).
    n : tuple of int
        Samples used per length.
    t_mean, t_sem : tuple of float
        Mean normalised transmission and its standard error per length.
    lnt_mean, lnt_sem : tuple of float
        Mean of ln t and its standard error per length (samples with t > 0).
    lnt_n : tuple of int
        Samples with t > 0 per length.
    value_mean : tuple of float
        Mean of the measurement itself per length (its own unit).
    n_nonpositive : int
        Samples with t <= 0 (left out of ln t).
    lstar : float
        Direct L* (nm) or its bound (``lstar_kind``).
    lstar_kind : str
        See :class:`Crossing`.
    lstar_ci_low, lstar_ci_high : float
        Percentile-bootstrap interval of the direct L* (NaN without resamples).
    confidence : float
        Its level.
    bootstrap_resamples, bootstrap_seed : int
        Bootstrap settings.
    bootstrap_censored_fraction : float
        Fraction of resamples whose L* is only a bound.
    incoherent, coherent : FitResult
        The two fits.
    preferred : str
        Which form describes the data, from each form's goodness-of-fit test
        (``model_choice``): ``"incoherent"`` or ``"coherent"`` (that form acceptable, the
        other rejected), ``"indistinguishable"`` (both acceptable: the data cannot tell them
        apart), ``"neither"`` (both rejected) or ``"undetermined"`` (a form could not be
        fitted or tested). Documents of schema ``helisweep-lstar/1`` may hold
        ``"comparable"`` (the former reduced-chi^2 ratio within 1.5), read as it is.
    notes : tuple of str
        Caveats (assumptions, extrapolations, excluded samples, the model-choice reason).
    method : str
        How the L* was obtained: :data:`LENGTH_SWEEP` (directly solved devices of the swept
        lengths) or ``"concatenated, coherent"`` / ``"concatenated, incoherent"`` (edges
        composed from a pool of solved segments, see :func:`concatenated_method`).
    adjacent_correlation : tuple of float
        Sample correlation over realisations of ``correlation_observable`` between
        consecutive swept lengths (one value per adjacent pair; NaN where undefined).
    correlation_observable : str
        ``"t"`` (the normalised transmission); empty in ``helisweep-lstar/1`` documents.
    model_choice : str
        The criterion behind ``preferred`` and its outcome (p-values).
    significance : float
        Level at which a form is rejected.
    distinguish_realisations : float
        When ``preferred`` is ``"indistinguishable"``: realisations that would resolve the
        second-order difference of the two forms at the swept lengths (see
        :func:`pipeline.analysis.lstar_fits.distinguishing_effort`); NaN otherwise.
    distinguish_max_length : float
        The same with the present realisations: the longest length (nm) of the swept
        lengths scaled by a common factor; NaN otherwise.
    """

    measurement: str
    kind: str
    quantised: float
    tolerance: float
    point: tuple
    length_parameter: str
    lengths: tuple
    n: tuple
    t_mean: tuple
    t_sem: tuple
    lnt_mean: tuple
    lnt_sem: tuple
    lnt_n: tuple
    value_mean: tuple
    n_nonpositive: int
    lstar: float
    lstar_kind: str
    lstar_ci_low: float
    lstar_ci_high: float
    confidence: float
    bootstrap_resamples: int
    bootstrap_seed: int
    bootstrap_censored_fraction: float
    incoherent: FitResult
    coherent: FitResult
    preferred: str
    notes: tuple = field(default=())
    method: str = LENGTH_SWEEP
    adjacent_correlation: tuple = field(default=())
    correlation_observable: str = ""
    model_choice: str = ""
    significance: float = math.nan
    distinguish_realisations: float = math.nan
    distinguish_max_length: float = math.nan

    def __post_init__(self):
        _canonical_nan(self)

    def to_dict(self) -> dict:
        """This result as JSON-safe plain data; :meth:`from_dict` reads it back exactly.

        Tuples become lists, ``point`` a ``{dimension: value}`` mapping (in order), the fits
        nested dicts (:meth:`FitResult.to_dict`) and non-finite numbers None (read back as
        NaN). ``flags`` is added for readers of the JSON; it is derived from the other
        entries, so :meth:`from_dict` does not read it.

        Returns
        -------
        dict
        """
        d = {f.name: getattr(self, f.name) for f in fields(self)}
        d["point"] = {str(k): v for k, v in self.point}
        d["incoherent"] = self.incoherent.to_dict()
        d["coherent"] = self.coherent.to_dict()
        d["flags"] = list(self.flags)
        return json_safe(d)

    @classmethod
    def from_dict(cls, data: Mapping) -> LStarResult:
        """The result written by :meth:`to_dict` (e.g. one entry of an ``lstar.json``).

        Parameters
        ----------
        data : mapping
            Output of :meth:`to_dict`; ``flags`` is ignored, ``method`` defaults to
            :data:`LENGTH_SWEEP`.

        Returns
        -------
        LStarResult

        Raises
        ------
        LStarError
            If an entry is missing or has the wrong type.
        """
        kw = _read_fields(cls, data, "an L* result (LStarResult.to_dict())")
        try:
            kw["point"] = tuple((str(k), float(v)) for k, v in dict(kw["point"]).items())
            kw["incoherent"] = FitResult.from_dict(kw["incoherent"])
            kw["coherent"] = FitResult.from_dict(kw["coherent"])
        except (TypeError, ValueError, AttributeError) as exc:
            raise LStarError(f"an L* result has an unreadable point or fit ({exc}); give "
                             f"LStarResult.to_dict() output") from exc
        return cls(**kw)

    @property
    def flags(self) -> tuple[str, ...]:
        """Short caveat tags: ``lower_bound``/``upper_bound`` (direct L* is a bound),
        ``bootstrap_censored`` (some resamples gave a bound), ``<form>_fit_failed``,
        ``<form>_lstar_extrapolated``."""
        out = []
        if self.lstar_kind != "interpolated":
            out.append(self.lstar_kind)
        if self.bootstrap_censored_fraction > 0:
            out.append("bootstrap_censored")
        for f in (self.incoherent, self.coherent):
            if not f.ok:
                out.append(f"{f.form}_fit_failed")
            elif not (self.lengths[0] <= f.lstar <= self.lengths[-1]):
                out.append(f"{f.form}_lstar_extrapolated")
        return tuple(out)

    def text(self) -> str:
        """A short human-readable summary."""
        where = ", ".join(f"{k} = {v:g}" for k, v in self.point) or "the only sweep point"
        lines = [
            f"L* of {self.measurement} (ideal {self.quantised:g}, tolerance {self.tolerance:.3g}) "
            f"at {where}; lengths {self.lengths[0]:g}-{self.lengths[-1]:g} nm "
            f"({len(self.lengths)} values, {min(self.n)}-{max(self.n)} samples each)",
        ]
        ci = (f", {self.confidence:.0%} interval [{self.lstar_ci_low:.4g}, {self.lstar_ci_high:.4g}] nm"
              if math.isfinite(self.lstar_ci_low) else "")
        if self.lstar_kind == "interpolated":
            lines.append(f"  direct: L* = {self.lstar:.4g} nm{ci}")
        elif self.lstar_kind == "lower_bound":
            lines.append(f"  direct: L* >= {self.lstar:.4g} nm (the mean never leaves the band; "
                         f"sweep longer lengths){ci}")
        else:
            lines.append(f"  direct: L* <= {self.lstar:.4g} nm (already outside the band at the "
                         f"shortest length; sweep shorter lengths){ci}")
        for f in (self.incoherent, self.coherent):
            sym = "lambda" if f.parameter == "lambda" else "xi"
            if f.ok:
                lines.append(f"  {f.form} fit: {sym} = {f.value:.4g} +- {f.error:.2g} nm"
                             f"{_interval_text(f.value_ci_low, f.value_ci_high, f.confidence)}, "
                             f"L*_fit = {f.lstar:.4g} nm"
                             f"{_interval_text(f.lstar_ci_low, f.lstar_ci_high, f.confidence)}")
                if math.isfinite(f.p_value):
                    lines.append(f"    generalised chi^2 {f.chi2:.3g} (dof {f.dof}), p = "
                                 f"{f.p_value:.3g} ({f.test}); {f.realisations} realisations, "
                                 f"shrinkage {f.shrinkage:.2f}")
                else:
                    lines.append(f"    reduced chi^2 {f.chi2_reduced:.3g} (dof {f.dof})")
            else:
                lines.append(f"  {f.form} fit: not available ({f.message})")
        choice = f" ({self.model_choice})" if self.model_choice else ""
        lines.append(f"  model choice: {self.preferred}{choice}")
        if math.isfinite(self.distinguish_realisations):
            lines.append(f"    to tell the forms apart: about {self.distinguish_realisations:.0f} "
                         f"realisations at these lengths, or lengths up to "
                         f"{self.distinguish_max_length:.4g} nm with these realisations "
                         f"(second-order estimate)")
        if self.adjacent_correlation:
            cors = ", ".join(f"{c:.2f}" for c in self.adjacent_correlation)
            lines.append(f"  correlation of {self.correlation_observable} between adjacent "
                         f"lengths: {cors}")
        lines += [f"  note: {n}" for n in self.notes]
        lines.append(f"  ({MODEL_NOTE})")
        return "\n".join(lines)


@dataclass(frozen=True)
class LStarTable:
    """L* at every sweep point (one :class:`LStarResult` per point; a model estimate)."""

    measurement: str
    results: tuple
    #: points without any usable sample: ((dim, value) pairs, reason)
    skipped: tuple = ()

    def to_dict(self) -> dict:
        """This table as JSON-safe plain data; :meth:`from_dict` reads it back exactly.

        Returns
        -------
        dict
            ``measurement``, ``results`` (:meth:`LStarResult.to_dict` per point) and
            ``skipped`` (``{"point": {...}, "reason": ...}`` per point without samples).
        """
        return {"measurement": self.measurement,
                "results": [r.to_dict() for r in self.results],
                "skipped": [{"point": json_safe({str(k): v for k, v in p}), "reason": why}
                            for p, why in self.skipped]}

    @classmethod
    def from_dict(cls, data: Mapping) -> LStarTable:
        """The table written by :meth:`to_dict`.

        Parameters
        ----------
        data : mapping
            Output of :meth:`to_dict`.

        Returns
        -------
        LStarTable
        """
        if not (isinstance(data, Mapping) and {"measurement", "results"} <= set(data)):
            raise LStarError(f"an L* table needs 'measurement' and 'results', got "
                             f"{_keys(data)!r}; give LStarTable.to_dict() output")
        return cls(str(data["measurement"]),
                   tuple(LStarResult.from_dict(r) for r in data["results"]),
                   tuple(_read_skipped(s) for s in data.get("skipped", ())))

    def text(self) -> str:
        """The summaries of all points."""
        return "\n\n".join(r.text() for r in self.results)

    def to_dataframe(self):
        """A pandas DataFrame, one row per point with the headline numbers."""
        import pandas as pd  # heavy; only this export needs it

        rows = []
        for r in self.results:
            row = {k: v for k, v in r.point}
            row.update(
                lstar=r.lstar, lstar_kind=r.lstar_kind, lstar_ci_low=r.lstar_ci_low,
                lstar_ci_high=r.lstar_ci_high, lambda_nm=r.incoherent.value,
                lambda_error=r.incoherent.error, lambda_ci_low=r.incoherent.value_ci_low,
                lambda_ci_high=r.incoherent.value_ci_high,
                lambda_chi2_reduced=r.incoherent.chi2_reduced,
                lambda_p_value=r.incoherent.p_value,
                xi_nm=r.coherent.value, xi_error=r.coherent.error,
                xi_ci_low=r.coherent.value_ci_low, xi_ci_high=r.coherent.value_ci_high,
                xi_chi2_reduced=r.coherent.chi2_reduced, xi_p_value=r.coherent.p_value,
                preferred=r.preferred, distinguish_realisations=r.distinguish_realisations,
                distinguish_max_length=r.distinguish_max_length,
                min_adjacent_correlation=min(
                    (c for c in r.adjacent_correlation if math.isfinite(c)), default=math.nan),
            )
            rows.append(row)
        df = pd.DataFrame(rows)
        df.attrs["note"] = MODEL_NOTE
        return df


def _interval_text(lo: float, hi: float, level: float) -> str:
    if not (math.isfinite(lo) and not math.isnan(hi)):
        return ""
    top = "inf" if hi == math.inf else f"{hi:.4g}"
    return f" ({level:.0%} interval [{lo:.4g}, {top}])"


# --------------------------------------------------------------------------- plain data
def _float(value) -> float:
    return math.nan if value is None else float(value)


def _int(value) -> int:
    if isinstance(value, float) and not value.is_integer():
        raise ValueError(f"{value!r} is not a whole number")
    return int(value)


def _bool(value) -> bool:
    if not isinstance(value, (bool, np.bool_)):
        raise ValueError(f"{value!r} is not true or false")
    return bool(value)


#: how each attribute type reads back from plain data (None is NaN for floats)
_READERS = {
    "str": str, "float": _float, "int": _int, "bool": _bool,
    "tuple[float]": lambda v: tuple(_float(x) for x in v),
    "tuple[int]": lambda v: tuple(_int(x) for x in v),
    "tuple[str]": lambda v: tuple(str(x) for x in v),
}

#: attribute types of the result classes that are not named by their annotation alone
_TUPLE_TYPES = {
    "lengths": "tuple[float]", "t_mean": "tuple[float]", "t_sem": "tuple[float]",
    "lnt_mean": "tuple[float]", "lnt_sem": "tuple[float]", "value_mean": "tuple[float]",
    "n": "tuple[int]", "lnt_n": "tuple[int]", "notes": "tuple[str]",
    "adjacent_correlation": "tuple[float]",
}


def _canonical_nan(obj) -> None:
    """Every NaN of a frozen result (also inside tuples of floats) becomes ``math.nan``, the
    one object ``from_dict`` reads None as, so results compare equal after a round trip."""
    for f in fields(obj):
        v = getattr(obj, f.name)
        if isinstance(v, float) and math.isnan(v) and v is not math.nan:
            object.__setattr__(obj, f.name, math.nan)
        elif isinstance(v, tuple) and any(isinstance(x, float) and math.isnan(x) for x in v):
            object.__setattr__(obj, f.name, tuple(
                math.nan if isinstance(x, float) and math.isnan(x) else x for x in v))


def _keys(data) -> list:
    return sorted(map(str, data)) if isinstance(data, Mapping) else [type(data).__name__]


def _read_fields(cls, data, what: str) -> dict[str, Any]:
    """The constructor arguments of a result class from its ``to_dict`` output."""
    if not isinstance(data, Mapping):
        raise LStarError(f"{what} must be a mapping, got {type(data).__name__!r}")
    missing = [f.name for f in fields(cls)
               if f.name not in data and f.default is MISSING and f.default_factory is MISSING]
    if missing:
        raise LStarError(f"{what} lacks {missing!r} (has {_keys(data)!r}); give the output of "
                         f"to_dict() of a current helisweep")
    out = {}
    for f in fields(cls):
        if f.name not in data:
            continue
        kind = _TUPLE_TYPES.get(f.name, f.type)
        reader = _READERS.get(kind)
        try:
            out[f.name] = data[f.name] if reader is None else reader(data[f.name])
        except (TypeError, ValueError) as exc:
            raise LStarError(f"{what}: {f.name} = {data[f.name]!r} cannot be read as {kind} "
                             f"({exc})") from exc
    return out


def _read_skipped(entry) -> tuple:
    try:
        return tuple((str(k), _float(v)) for k, v in entry["point"].items()), str(entry["reason"])
    except (KeyError, TypeError, AttributeError, ValueError) as exc:
        raise LStarError(f"a skipped point {entry!r} must be {{'point': {{...}}, 'reason': ...}}"
                         ) from exc


# --------------------------------------------------------------------------- documents
def _is_result_dict(obj: Mapping) -> bool:
    return "lstar" in obj and "lengths" in obj


def _collect(obj, results: list, skipped: list) -> None:
    """Flatten ``obj`` into results and (measurement, point, reason) skipped points."""
    if obj is None:
        return
    if isinstance(obj, LStarResult):
        results.append(obj)
    elif isinstance(obj, LStarTable):
        results.extend(obj.results)
        skipped.extend((obj.measurement, p, why) for p, why in obj.skipped)
    elif isinstance(obj, Mapping) and "schema" in obj:
        _collect_document(obj, results, skipped)
    elif isinstance(obj, Mapping) and _is_result_dict(obj):
        results.append(LStarResult.from_dict(obj))
    elif isinstance(obj, Mapping) and {"measurement", "results"} <= set(obj):
        _collect(LStarTable.from_dict(obj), results, skipped)
    elif isinstance(obj, Mapping):  # {measurement: result(s)}
        for value in obj.values():
            _collect(value, results, skipped)
    elif isinstance(obj, (list, tuple)):
        for item in obj:
            _collect(item, results, skipped)
    else:
        raise LStarError(f"cannot read an L* result from a {type(obj).__name__!r}; give "
                         f"LStarResult, LStarTable, their to_dict() output or an lstar.json document")


def _collect_document(doc: Mapping, results: list, skipped: list) -> None:
    if doc.get("schema") not in _READABLE_SCHEMAS:
        raise LStarError(f"L* document schema {doc.get('schema')!r} is not one of "
                         f"{_READABLE_SCHEMAS!r}; rewrite it with this helisweep (helisweep report)")
    results.extend(LStarResult.from_dict(r) for r in doc.get("results", ()))
    for entry in doc.get("skipped", ()):
        point, why = _read_skipped(entry)
        skipped.append((str(entry.get("measurement", "")), point, why))


def lstar_results(obj) -> list[LStarResult]:
    """Every L* result in ``obj``, in order.

    Parameters
    ----------
    obj : LStarResult, LStarTable, mapping or sequence
        Results, tables, their ``to_dict()`` output, an L* document (see the module
        docstring), ``{measurement: result or table}``, or a sequence of any of these.
        None gives no results.

    Returns
    -------
    list of LStarResult
    """
    results: list = []
    _collect(obj, results, [])
    return results


def lstar_document(obj) -> dict:
    """The JSON document of L* results (the layout in the module docstring).

    Parameters
    ----------
    obj
        Anything :func:`lstar_results` reads; tables also contribute their skipped points.

    Returns
    -------
    dict
        JSON-safe: ``json.dumps(doc, allow_nan=False)`` works.
    """
    results: list = []
    skipped: list = []
    _collect(obj, results, skipped)
    return {"schema": LSTAR_SCHEMA, "note": MODEL_NOTE,
            "results": [r.to_dict() for r in results],
            "skipped": [{"measurement": m, "point": json_safe(dict(p)), "reason": why}
                        for m, p, why in skipped]}


def save_lstar(path: str | Path, obj) -> Path:
    """Write L* results as an L* JSON document (``lstar.json``, ``lstar-concatenated.json``).

    Parameters
    ----------
    path : str or Path
        The file; its directory must exist.
    obj
        Anything :func:`lstar_results` reads.

    Returns
    -------
    Path
        The written file.
    """
    path = Path(path)
    text = json.dumps(lstar_document(obj), indent=2, allow_nan=False)
    path.write_text(text + "\n", encoding="utf-8")
    return path


def load_lstar(path: str | Path) -> list[LStarResult]:
    """The L* results of a file written by :func:`save_lstar`.

    Parameters
    ----------
    path : str or Path
        An ``lstar.json`` or ``lstar-concatenated.json``.

    Returns
    -------
    list of LStarResult
        In file order; each says how it was obtained (``method``) and where (``point``).

    Raises
    ------
    LStarError
        If the file is not JSON or not of schema :data:`LSTAR_SCHEMA`.
    """
    path = Path(path)
    try:
        doc = json.loads(path.read_text(encoding="utf-8"))
    except (OSError, ValueError) as exc:
        raise LStarError(f"cannot read L* results from {str(path)!r} ({exc}); give an "
                         f"lstar.json written by helisweep") from exc
    if not isinstance(doc, Mapping) or "schema" not in doc:
        raise LStarError(f"{str(path)!r} is not an L* document (no 'schema' entry); it may "
                         f"predate {LSTAR_SCHEMA!r}: rewrite it with helisweep report")
    results: list = []
    _collect_document(doc, results, [])
    return results
