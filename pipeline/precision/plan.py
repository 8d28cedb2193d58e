"""What a precision target asks for: the settings, the round boundaries, the checks.

With ``[run] target_ci`` (or ``target_lstar_ci``) the number of realisations is chosen per
sweep point. Rounds end at fixed realisation counts, the *boundaries*::

    B_1 = realisations, B_{k+1} = min(B_k + step, max_realisations),  step = realisations

so a boundary never depends on timing, worker count or where a run was killed: the first
block is also the step (a first block of 20 gives 20, 40, 60, ... up to 2000).
"""

from __future__ import annotations

from dataclasses import asdict, dataclass

from pipeline.errors import ConfigError
from pipeline.sweep.config import SweepConfig

__all__ = ['PrecisionPlan', 'plan_precision', 'LENGTH_PARAMETERS', 'BOOTSTRAP_RESAMPLES',
           'BOOTSTRAP_SEED', 'CONFIDENCE', 'LSTAR_TOLERANCE']

#: geometry parameters that are edge lengths: the L* report's rule (a length sweep of at least
#: two values of one of these gives L*, see :func:`pipeline.output.report.lstar_for_run`)
LENGTH_PARAMETERS = ("length", "arm_length")

#: bootstrap settings of the judged intervals: the defaults of
#: :func:`pipeline.analysis.summary.summarize` and
#: :func:`pipeline.analysis.lstar.longest_ballistic_length`, which the report uses, so the
#: stopping rule judges the interval the report states
BOOTSTRAP_RESAMPLES = 2000
BOOTSTRAP_SEED = 0
CONFIDENCE = 0.95
#: relative tolerance of L* (the default of ``helisweep report --tolerance``)
LSTAR_TOLERANCE = 0.05


@dataclass(frozen=True)
class PrecisionPlan:
    """The precision target of a run (recorded in the store's ``precision`` attribute)."""

    #: largest half-width of the interval of the mean, per measurement in its own unit (or None)
    target_ci: float | None
    #: largest relative half-width of the L* interval (or None)
    target_lstar_ci: float | None
    #: realisations of the first round (``[run] realisations``)
    first_block: int
    #: realisations added per round at a point still above the target
    step: int
    #: most realisations per point (``[run] max_realisations``)
    max_realisations: int
    #: measurements whose L* is judged (those of the L* report; empty without target_lstar_ci)
    lstar_measurements: tuple[str, ...] = ()
    confidence: float = CONFIDENCE
    bootstrap_resamples: int = BOOTSTRAP_RESAMPLES
    bootstrap_seed: int = BOOTSTRAP_SEED
    lstar_tolerance: float = LSTAR_TOLERANCE

    @property
    def boundaries(self) -> tuple[int, ...]:
        """Realisation counts at which the intervals are judged, ascending."""
        out = list(range(self.first_block, self.max_realisations, self.step))
        return tuple(out + [self.max_realisations])

    def next_boundary(self, boundary: int) -> int | None:
        """The boundary after ``boundary`` (None at the last one)."""
        later = [b for b in self.boundaries if b > boundary]
        return later[0] if later else None

    def to_dict(self) -> dict:
        """JSON-safe description (the store's ``precision`` attribute)."""
        out = asdict(self)
        out["lstar_measurements"] = list(self.lstar_measurements)
        out["interval"] = ("half-width (ci_high - ci_low) / 2 of the interval of the mean of "
                           "pipeline.analysis.statistics.row_statistics (as in the summary), over "
                           "the done samples below the boundary; the largest over measurements")
        out["rounds"] = ("boundaries at first_block + k * step up to max_realisations; a point "
                         "above the target gets the next block, the others stop for good")
        return out

    @classmethod
    def from_dict(cls, data: dict) -> "PrecisionPlan":
        """Inverse of :meth:`to_dict`."""
        keys = cls.__dataclass_fields__
        kw = {k: v for k, v in data.items() if k in keys}
        kw["lstar_measurements"] = tuple(kw.get("lstar_measurements", ()))
        return cls(**kw)


def plan_precision(cfg: SweepConfig) -> PrecisionPlan | None:
    """The precision target of a configuration, checked before any compute.

    Parameters
    ----------
    cfg : SweepConfig
        The run's configuration.

    Returns
    -------
    PrecisionPlan or None
        None when ``[run]`` sets no target.

    Raises
    ------
    ConfigError
        A target that cannot be met this way: with an ``[edges]`` network run, or
        ``target_lstar_ci`` without a sweep of an edge length.
    """
    run = cfg.run
    if not run.has_target:
        return None
    keys = " and ".join(k for k in ("target_ci", "target_lstar_ci") if getattr(run, k) is not None)
    if cfg.edges is not None:
        raise ConfigError(
            f"[run] {keys} is not supported with an [edges] network run: its devices are "
            f"sampled from segment pools in one go, not added in blocks per sweep point. Set "
            f"[edges] sequences (sampled devices per point) instead and drop {keys}, or run "
            f"the device directly (without [edges])"
        )
    lstar_measurements: tuple[str, ...] = ()
    if run.target_lstar_ci is not None:
        geo = cfg.sweep.geometry
        if geo is None or geo.parameter not in LENGTH_PARAMETERS or len(geo.values) < 2:
            what = ("no geometry sweep" if geo is None else
                    f"a sweep of {geo.parameter!r} over {len(geo.values)} value(s)")
            raise ConfigError(
                f"[run] target_lstar_ci = {run.target_lstar_ci!r} needs L*, i.e. a sweep of an "
                f"edge length ({' or '.join(LENGTH_PARAMETERS)}) over at least two values, but "
                f"the config has {what}. Set [sweep] geometry = {{ parameter = \"length\", "
                f"values = [...] }} or use target_ci"
            )
        lstar_measurements = tuple(cfg.measure.labels)
    return PrecisionPlan(
        target_ci=run.target_ci, target_lstar_ci=run.target_lstar_ci,
        first_block=run.realisations, step=run.realisations,
        max_realisations=run.realisation_limit, lstar_measurements=lstar_measurements,
    )
