"""Precision instead of a count: realisations are added per sweep point until the interval
of the mean (``[run] target_ci``) or of L* (``target_lstar_ci``) is narrow enough, or
``max_realisations`` is reached.

Modules, one job each:

* :mod:`~pipeline.precision.plan` -- the target, the round boundaries, the checks before compute;
* :mod:`~pipeline.precision.judge` -- half-widths per point from the stored samples;
* :mod:`~pipeline.precision.loop` -- the stopping loop on an open sweep session;
* :mod:`~pipeline.precision.status` -- how far each point is from its target.
"""

from pipeline.precision.loop import run_to_precision
from pipeline.precision.plan import PrecisionPlan, plan_precision
from pipeline.precision.status import precision_status

__all__ = ['run_to_precision', 'plan_precision', 'PrecisionPlan', 'precision_status']
