#!/usr/bin/env python3
"""Write the example GDSII device ``geometries/tarn-cross-D.gds`` (reproducibly).

The device is a four-terminal cross on the invented wafer QW-Tarn-7: two 200 nm wide bars,
800 nm long, crossing at right angles. Layout units are µm (library unit 1e-6 m, database grid
1 nm) so loading it exercises the unit conversion to nm.

Layers (layer/datatype, the default map of :func:`pipeline.device.readers.load_device`):

* 1/0 mesa: the two bars as separate, overlapping rectangles (the loader unions them);
* 2/0 contact pads: one per arm end, as wide as the arm, overlapping it by 20 nm and reaching
  100 nm beyond it, each labelled ``"1"`` (west), ``"2"`` (south), ``"3"`` (east), ``"4"``
  (north) — counter-clockwise, so terminal order follows the perimeter;
* 3/0 gate: a 300 nm square top gate over the crossing, labelled ``"TG"``.

The timestamp is fixed so rerunning the script reproduces the file byte for byte.

Usage: ``python scripts/make_example_gds.py [OUTPUT]``
"""

from __future__ import annotations

import argparse
import datetime
from pathlib import Path

import gdstk

__all__ = ["build_library", "main"]

_UM_PER_NM = 1e-3
# Fixed so the written file does not change between runs.
_TIMESTAMP = datetime.datetime(2024, 1, 1, 0, 0, 0)
_DEFAULT_OUTPUT = Path(__file__).resolve().parent.parent / "geometries" / "tarn-cross-D.gds"


def _rect_nm(x0: float, y0: float, x1: float, y1: float, layer: int) -> gdstk.Polygon:
    """A rectangle given in nm, stored in the library's µm user units."""
    return gdstk.rectangle(
        (x0 * _UM_PER_NM, y0 * _UM_PER_NM), (x1 * _UM_PER_NM, y1 * _UM_PER_NM), layer=layer
    )


def _label_nm(text: str, x: float, y: float, layer: int) -> gdstk.Label:
    return gdstk.Label(text, (x * _UM_PER_NM, y * _UM_PER_NM), layer=layer)


def build_library() -> gdstk.Library:
    """Build the cross device in a fresh gdstk library (unit 1 µm, grid 1 nm).

    Returns
    -------
    gdstk.Library
        One top cell, ``tarn-cross-D``.
    """
    lib = gdstk.Library("QW-Tarn-7", unit=1e-6, precision=1e-9)
    cell = lib.new_cell("tarn-cross-D")
    # Mesa (nm): horizontal bar x 0..800, y 300..500; vertical bar x 300..500, y 0..800.
    cell.add(_rect_nm(0, 300, 800, 500, layer=1))
    cell.add(_rect_nm(300, 0, 500, 800, layer=1))
    # Contact pads: arm-wide, 20 nm onto the mesa, 100 nm beyond the arm end.
    pads = {
        "1": (-100, 300, 20, 500),  # west
        "2": (300, -100, 500, 20),  # south
        "3": (780, 300, 900, 500),  # east
        "4": (300, 780, 500, 900),  # north
    }
    for text, (x0, y0, x1, y1) in pads.items():
        cell.add(_rect_nm(x0, y0, x1, y1, layer=2))
        cell.add(_label_nm(text, (x0 + x1) / 2, (y0 + y1) / 2, layer=2))
    cell.add(_rect_nm(250, 250, 550, 550, layer=3))
    cell.add(_label_nm("TG", 400, 400, layer=3))
    return lib


def main(argv: list[str] | None = None) -> int:
    """Write the example GDSII file; return the process exit code."""
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("output", nargs="?", type=Path, default=_DEFAULT_OUTPUT)
    args = parser.parse_args(argv)
    args.output.parent.mkdir(parents=True, exist_ok=True)
    build_library().write_gds(str(args.output), timestamp=_TIMESTAMP)
    print(f"wrote {args.output}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
