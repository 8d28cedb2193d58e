"""Every exception and warning class of the package, in one place.

Errors a user can act on derive from :class:`HelisweepError` (a ``ValueError``): the message
says what is wrong, shows the offending value with ``!r`` and names the fix. Warnings derive
from :class:`HelisweepWarning` (a ``UserWarning``); the command line prints each as one line
``helisweep: warning: <message>``.
"""

from __future__ import annotations

__all__ = [
    "HelisweepError",
    "GeometryError",
    "ModelError",
    "TransportError",
    "ConfigError",
    "StoreError",
    "ClusterError",
    "AggregateError",
    "LStarError",
    "ExportError",
    "HelisweepWarning",
    "PreflightWarning",
    "ConfigWarning",
    "SummaryWarning",
    "ConcatenationWarning",
    "NetworkWarning",
    "SharedPathWarning",
]


# --------------------------------------------------------------------------- errors
class HelisweepError(ValueError):
    """Base class of all errors raised for bad input or an impossible request."""


class GeometryError(HelisweepError):
    """A device outline, contact or gate is invalid (the message says where)."""


class ModelError(HelisweepError):
    """Model parameters or the lattice are unsuitable (e.g. lattice too coarse)."""


class TransportError(HelisweepError):
    """A transport quantity cannot be computed (singular or ill-posed measurement)."""


class ConfigError(HelisweepError):
    """A sweep configuration is invalid (the message names the key)."""


class StoreError(HelisweepError):
    """A result store cannot be used as asked (e.g. written by a different config)."""


class ClusterError(HelisweepError):
    """A cluster could not be used as asked (no workers arrived, ``sbatch`` failed, ...)."""


class AggregateError(HelisweepError):
    """A store cannot be summarised as asked (the message names the value and the fix)."""


class LStarError(HelisweepError):
    """L* cannot be computed as asked (the message names the value and the fix)."""


class ExportError(HelisweepError):
    """A package cannot be written or read as asked (the message says why and what to do)."""


# --------------------------------------------------------------------------- warnings
class HelisweepWarning(UserWarning):
    """Base class of the package's warnings: a result is usable but has a caveat."""


class PreflightWarning(HelisweepWarning):
    """A preflight check found something that degrades the results (e.g. discretisation)."""


class ConfigWarning(HelisweepWarning):
    """A configuration uses a deprecated form (the message says what to write instead)."""


class SummaryWarning(HelisweepWarning):
    """A summary or L* rests on fewer samples than asked for, or lacks an ideal value."""


class ConcatenationWarning(HelisweepWarning):
    """A segment set or composition is outside the regime where it is accurate."""


class NetworkWarning(HelisweepWarning):
    """The edge-network model runs but with a caveat (e.g. a section modelled shorter or
    longer than it is)."""


class SharedPathWarning(HelisweepWarning):
    """A path that Slurm jobs on other nodes (or a resubmitted job) must see is node-local."""
