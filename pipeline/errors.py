"""The project's exception hierarchy.

Every error a user can act on derives from :class:`HelisweepError` (a ``ValueError``), and its
message says what is wrong, shows the offending value with ``!r`` and names the fix.
"""

from __future__ import annotations

__all__ = [
    "HelisweepError",
    "GeometryError",
    "ModelError",
    "TransportError",
    "ConfigError",
    "StoreError",
]


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
