"""The sample store's format version: what it says, what changes it, which versions are read.

A sample store names its format in the group attribute ``format``::

    format = "helisweep-samples/<version>"        e.g. "helisweep-samples/1"

and every writing session records the helisweep version that wrote it (``sessions[i]
["helisweep"]``), so a store that this version cannot use can say which version can.

What changes the version
------------------------
The version goes up with any change that a reader of the previous version would misread,
or that it could not read at all:

* an array, dimension or coordinate renamed, removed, reordered or given another meaning
  (e.g. the order ``lead_to, lead_from`` of the transmission matrix, the status codes of
  :class:`pipeline.sweep.store.SampleStatus`, the unit of a measurement);
* a new array or attribute that changes which samples count (as a request per point does:
  an older reader that ignored it would average samples that are not part of the run);
* a dtype, a fill value or a codec an older reader cannot decode;
* the schema of an attribute that readers rely on (``config_text``, ``identity``,
  ``realisation_block``, ``failures``).

It does not go up for what older readers may safely ignore: a new optional attribute, a
new session field, other chunk sizes (Zarr reads any), or a change of the numbers themselves
under an unchanged layout (that is the run identity's business: the random-number scheme
and the material numbers, :mod:`pipeline.sweep.identity`).

Reading and resuming
--------------------
This helisweep reads every version in :data:`READABLE_VERSIONS` (its own and each older one
it knows, with what that version holds), and resumes (writes into) stores of its own
version :data:`STORE_FORMAT_VERSION` only. A store of a version it does not read -- newer,
or older than any it knows -- is refused before anything is computed, saying what the store
is, which helisweep wrote it and what to do: open it with that version (or a newer one), or
start the run anew with ``helisweep run CONFIG --fresh`` (``fresh=True`` in Python), which
moves the old store aside and never deletes it. The history of the versions is in
``docs/store-format.md``.
"""

from __future__ import annotations

import re
from collections.abc import Mapping
from dataclasses import dataclass
from pathlib import Path

from pipeline import __version__
from pipeline.errors import StoreError

__all__ = ['STORE_FORMAT_NAME', 'STORE_FORMAT_VERSION', 'STORE_FORMAT', 'READABLE_VERSIONS',
           'StoreFormat', 'parse_format', 'written_by', 'check_readable', 'resume_problem',
           'format_note']

#: the name part of the ``format`` attribute of every sample store
STORE_FORMAT_NAME = "helisweep-samples"

#: the format version this helisweep writes (and the only one it resumes)
STORE_FORMAT_VERSION = 1

#: the ``format`` attribute of a store this helisweep writes
STORE_FORMAT = f"{STORE_FORMAT_NAME}/{STORE_FORMAT_VERSION}"

#: every format version this helisweep reads, with what a store of that version holds
READABLE_VERSIONS: dict[int, str] = {
    1: ("Zarr v3 group; transmission, modes, measurements and status over (realisation, "
        "geometry, disorder_strength, b_perp, gate_voltage, energy[, lead_to, lead_from | "
        "lead | measurement]); optional requested_realisations; attributes format, "
        "config_hash, config_text, identity, run_name, root_seed, realisation_block, "
        "created, sessions, failures"),
}

_PATTERN = re.compile(r"^(?P<name>[A-Za-z0-9_.\-]+)/(?P<version>[0-9]+)$")


@dataclass(frozen=True, slots=True)
class StoreFormat:
    """The ``format`` attribute of a store, taken apart."""

    #: the attribute as found (None when the store has none)
    text: str | None
    #: the name part (``"helisweep-samples"`` for a sample store), None if unparsable
    name: str | None
    #: the version number, None if unparsable
    version: int | None

    @property
    def is_samples(self) -> bool:
        """Whether the attribute names a helisweep sample store (of any version)."""
        return self.name == STORE_FORMAT_NAME and self.version is not None


def parse_format(value) -> StoreFormat:
    """Take a ``format`` attribute apart.

    Parameters
    ----------
    value : str or None
        The attribute, e.g. ``"helisweep-samples/1"``.

    Returns
    -------
    StoreFormat
        ``name`` and ``version`` are None when the text is not ``<name>/<integer>``.

    Examples
    --------
    >>> parse_format("helisweep-samples/1").version
    1
    >>> parse_format("something else").is_samples
    False
    """
    if not isinstance(value, str):
        return StoreFormat(None if value is None else repr(value), None, None)
    m = _PATTERN.match(value.strip())
    if m is None:
        return StoreFormat(value, None, None)
    return StoreFormat(value, m["name"], int(m["version"]))


def written_by(attrs: Mapping) -> str:
    """Which helisweep last wrote a store, as far as its sessions say.

    Parameters
    ----------
    attrs : mapping
        The store's attributes.

    Returns
    -------
    str
        ``"helisweep 0.1.0"``, or ``"an earlier helisweep (...)"`` saying that the sessions
        do not record the version, and when the store was created.
    """
    for session in reversed(list(attrs.get("sessions") or [])):
        if isinstance(session, Mapping) and session.get("helisweep"):
            return f"helisweep {session['helisweep']}"
    created = attrs.get("created")
    return ("an earlier helisweep (its sessions do not record which version"
            + (f"; the store was created {created}" if created else "") + ")")


def _readable_text() -> str:
    return ", ".join(str(v) for v in sorted(READABLE_VERSIONS))


def _not_samples(path: Path, fmt: StoreFormat) -> StoreError:
    return StoreError(
        f"{str(path)!r} is not a helisweep sample store (format {fmt.text!r}, expected "
        f"'{STORE_FORMAT_NAME}/<version>'); give the path of a samples.zarr written by helisweep, "
        f"or choose another run directory"
    )


def _unreadable(path: Path, fmt: StoreFormat, attrs: Mapping) -> str:
    """The message for a sample store of a version this helisweep does not read."""
    who = written_by(attrs)
    head = (f"the sample store {str(path)!r} has format {fmt.text!r}, written by {who}; this "
            f"helisweep {__version__} reads format version(s) {_readable_text()} and writes "
            f"{STORE_FORMAT_VERSION}.")
    if fmt.version > STORE_FORMAT_VERSION:
        what = (f" The store is newer than this helisweep: read or resume it with {who} or a "
                f"later version (upgrade: pip install --upgrade helisweep)")
    else:
        what = (f" The store is older than any format this helisweep knows: read or resume it "
                f"with {who}")
    return (head + what + "; or start the run anew with this version: `helisweep run CONFIG "
            "--fresh` (fresh=True in Python) moves the old store aside (it is never deleted)")


def check_readable(attrs: Mapping, path: str | Path) -> StoreFormat:
    """Refuse a store this helisweep cannot read, saying what it is and what to do.

    Parameters
    ----------
    attrs : mapping
        The store's attributes.
    path : str or Path
        The store (for the message).

    Returns
    -------
    StoreFormat
        The store's format, one of :data:`READABLE_VERSIONS`.

    Raises
    ------
    StoreError
        Not a helisweep sample store, or a version this helisweep does not read (newer, or
        older than any it knows): the message names the version, the helisweep that wrote
        it and the fix.
    """
    path = Path(path)
    fmt = parse_format(attrs.get("format"))
    if not fmt.is_samples:
        raise _not_samples(path, fmt)
    if fmt.version not in READABLE_VERSIONS:
        raise StoreError(_unreadable(path, fmt, attrs))
    return fmt


def resume_problem(attrs: Mapping, path: str | Path) -> str | None:
    """Why this helisweep cannot write into (resume) a store, or None when it can.

    Parameters
    ----------
    attrs : mapping
        The store's attributes.
    path : str or Path
        The store (for the message).

    Returns
    -------
    str or None
        The reason and the fix for a sample store of another version (newer, unknown, or
        older and readable but written in a layout this version no longer writes); None for
        a store of :data:`STORE_FORMAT_VERSION`.

    Raises
    ------
    StoreError
        Not a helisweep sample store at all (``--fresh`` does not move foreign data).
    """
    path = Path(path)
    fmt = parse_format(attrs.get("format"))
    if not fmt.is_samples:
        raise _not_samples(path, fmt)
    if fmt.version == STORE_FORMAT_VERSION:
        return None
    if fmt.version not in READABLE_VERSIONS:
        return _unreadable(path, fmt, attrs)
    who = written_by(attrs)
    return (f"the sample store {str(path)!r} has the older format {fmt.text!r} (written by "
            f"{who}); this helisweep {__version__} reads it (status, report) but writes only "
            f"format {STORE_FORMAT_VERSION}, so it does not add samples to it. Finish the run "
            f"with {who}, or start it anew with this version: `helisweep run CONFIG --fresh` "
            f"(fresh=True in Python) moves the old store aside (it is never deleted)")


def format_note(attrs: Mapping) -> str | None:
    """One line for ``helisweep status`` about a readable store of an older format (None for
    a store of this version's format)."""
    fmt = parse_format(attrs.get("format"))
    if not fmt.is_samples or fmt.version == STORE_FORMAT_VERSION:
        return None
    return (f"  store format {fmt.text!r} (older than this helisweep's {STORE_FORMAT_VERSION}): "
            f"readable here; finish the run with {written_by(attrs)}, or `helisweep run CONFIG "
            f"--fresh` moves it aside and starts anew")
