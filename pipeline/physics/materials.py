"""Named BHZ parameter sets for quantum spin Hall materials.

Units: A in meV nm, B and D in meV nm^2, C and M in meV, the bulk-inversion-asymmetry (BIA)
coupling ``delta_bia`` in meV, g-factors dimensionless. In the BHZ model the bands are
*inverted* (a quantum spin Hall insulator) when M/B > 0.

Each preset names its source. Values marked "from memory" were recalled, not re-read from
the paper: treat them as model estimates and check them against the source before
quantitative use. To add a preset, add a :class:`BHZParameters` to ``PRESETS`` with a
``source`` string (see DEVELOPERS.md).
"""

from __future__ import annotations

import difflib
from dataclasses import asdict, dataclass, replace

from pipeline.errors import ModelError

__all__ = ['BHZParameters', 'PRESETS', 'get_preset']


@dataclass(frozen=True)
class BHZParameters:
    """Parameters of the four-band Bernevig-Hughes-Zhang model."""

    #: linear (Dirac) coupling between E and H bands, meV nm
    A: float
    #: band-inversion curvature, meV nm^2 (negative for HgTe-type wells)
    B: float
    #: energy offset, meV
    C: float
    #: particle-hole asymmetric curvature, meV nm^2 (|D| < |B| for a gap)
    D: float
    #: mass (half the gap at k = 0), meV; inverted when M/B > 0
    M: float
    #: bulk-inversion-asymmetry coupling Delta between opposite spins, meV (0: off)
    delta_bia: float = 0.0
    #: effective g-factor of the E1 band (perpendicular field)
    g_E: float = 0.0
    #: effective g-factor of the H1 band (perpendicular field)
    g_H: float = 0.0
    #: human-readable name
    name: str = "custom"
    #: where the numbers come from
    source: str = "user supplied"
    #: caveats for the user (not quoted in generated methods text)
    note: str = ""

    def __post_init__(self) -> None:
        for key in ("A", "B", "C", "D", "M", "delta_bia", "g_E", "g_H"):
            value = getattr(self, key)
            if not isinstance(value, (int, float)) or value != value:
                raise ModelError(f"BHZ parameter {key} must be a real number, got {value!r}")
        if self.B == 0:
            raise ModelError("BHZ parameter B must be non-zero (it sets the band curvature); got 0")
        if abs(self.D) >= abs(self.B):
            raise ModelError(
                f"BHZ parameters give no bulk gap: |D| = {abs(self.D)!r} >= |B| = {abs(self.B)!r} "
                f"meV nm^2; the model needs |D| < |B|"
            )

    @property
    def inverted(self) -> bool:
        """True for a quantum spin Hall (band-inverted) parameter set: M/B > 0."""
        return self.M / self.B > 0

    def with_(self, **changes: float) -> "BHZParameters":
        """A copy with some parameters changed (validated again)."""
        return replace(self, **changes)

    def as_dict(self) -> dict:
        return asdict(self)


PRESETS: dict[str, BHZParameters] = {
    # Inverted HgTe/CdTe well above the critical thickness (~6.3 nm).
    "hgte-7.0nm": BHZParameters(
        A=364.5, B=-686.0, C=0.0, D=-512.0, M=-10.0,
        g_E=22.7, g_H=-1.21,
        name="HgTe/CdTe quantum well, 7.0 nm (inverted)",
        source="Koenig et al., J. Phys. Soc. Jpn. 77, 031007 (2008)",
        note=(
            "A, B, D, M as in Table I of the source; g-factors recalled from the same paper "
            "(from memory). BIA is off by default; the same paper estimates Delta ~ 1.6 meV "
            "(from memory): set material.delta_bia to include it"
        ),
    ),
    # Normal (trivial) HgTe/CdTe well below the critical thickness.
    "hgte-5.5nm": BHZParameters(
        A=387.0, B=-480.0, C=0.0, D=-306.0, M=9.0,
        name="HgTe/CdTe quantum well, 5.5 nm (normal, trivial insulator)",
        source="Koenig et al., J. Phys. Soc. Jpn. 77, 031007 (2008)",
        note="values recalled from Table I of the source (from memory): check before quantitative use",
    ),
    # Inverted InAs/GaSb bilayer in AlSb barriers (broken-gap type II).
    "inas-gasb": BHZParameters(
        A=3.7, B=-660.0, C=0.0, D=-58.4, M=-7.8,
        name="InAs/GaSb bilayer, 10 nm/10 nm (inverted)",
        source="Liu et al., Phys. Rev. Lett. 100, 236601 (2008)",
        note=(
            "values recalled from the source (from memory); the small A makes edge states "
            "extend over hundreds of nm - check before quantitative use"
        ),
    ),
}


def get_preset(name: str) -> BHZParameters:
    """Look up a material preset by name; unknown names suggest the nearest one."""
    try:
        return PRESETS[name]
    except KeyError:
        near = difflib.get_close_matches(name, PRESETS, n=1)
        hint = f" Did you mean {near[0]!r}?" if near else ""
        raise ModelError(
            f"unknown material preset {name!r}.{hint} Known presets: {', '.join(PRESETS)}; "
            f"or give A, B, C, D, M explicitly"
        ) from None
