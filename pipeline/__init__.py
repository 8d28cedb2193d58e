"""helisweep: disorder-averaged edge transport in quantum spin Hall devices.

Stages (one module each): :mod:`geometry` (device outlines, contacts, gates),
:mod:`geometry_io` (GeoJSON, WKT, GDSII), :mod:`materials` (BHZ parameter presets),
:mod:`model` (BHZ tight-binding values), :mod:`mesh` (outline -> Kwant system with leads),
:mod:`transport` (scattering -> transmission matrix), :mod:`landauer` (Landauer-Buttiker
resistances, independent of Kwant), :mod:`preflight` (checks before a sweep).
"""

__version__ = "0.1.0"
