"""The one clock of the package: UTC timestamps for provenance and for names of moved files."""

from __future__ import annotations

import datetime as _dt

__all__ = ["utc_now", "file_stamp"]


def utc_now() -> str:
    """The current UTC time in ISO 8601 to the second, e.g. ``2026-12-03T07:18:09+00:00``."""
    return _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds")


def file_stamp() -> str:
    """The current UTC time for a file name (no colons), e.g. ``20261203T071809Z``."""
    return _dt.datetime.now(_dt.timezone.utc).strftime("%Y%m%dT%H%M%SZ")
