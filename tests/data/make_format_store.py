"""Write the small committed store of the current format version, and the values it holds.

    .venv/bin/python tests/data/make_format_store.py

writes ``tests/data/store-format-<version>/samples.zarr`` (a 40 nm strip of two lengths at two
energies, 3 realisations, two measurements; about 20 kB) with this helisweep, and beside it
``expected.json``: every measurement and status value as read with zarr directly, and the mean
over done samples per sweep point computed with NumPy. ``tests/test_store_format.py`` opens the
store with today's reader and compares with these values, so a change that stops stores of
this version from being read fails there (see docs/store-format.md).

Run it once per format version: it refuses to replace a store that exists (the committed one is
the record of what that version wrote).
"""

from __future__ import annotations

import json
import sys
from pathlib import Path

import numpy as np
import zarr

from pipeline import __version__
from pipeline.sweep.clusters import local_client
from pipeline.sweep.config import parse_config
from pipeline.sweep.driver import run_sweep
from pipeline.sweep.storeformat import STORE_FORMAT, STORE_FORMAT_VERSION

HERE = Path(__file__).resolve().parent

CONFIG = """\
# the committed test store of the sample store's format (tests/data/make_format_store.py)
[run]
name = "format-store"
seed = 7
realisations = 3
directory = "runs/{name}"

[device]
template = "strip"
parameters = { width = 40.0 }

[lattice]
constant = 5.0

[material]
preset = "hgte-7.0nm"

[contacts]
doping = 25.0

[[disorder]]
kind = "anderson"
width = 30.0

[[disorder]]
kind = "magnetic"
inplane = 10.0
density = 0.01
aligned = false

[sweep]
energy = [-3.0, 1.0]
geometry = { parameter = "length", values = [60.0, 90.0] }

[measure]
labels = ["G(L,R)", "R(L,R;L,R)"]
"""


def expected_values(store: Path) -> dict:
    """What the store holds, read with zarr alone (no helisweep reader involved)."""
    group = zarr.open_group(str(store), mode="r", use_consolidated=False)
    measurements = np.asarray(group["measurements"][...])
    status = np.asarray(group["status"][...])
    done = (status == 1)[..., None] & np.isfinite(measurements)
    counts = done.sum(axis=0)
    means = np.where(done, measurements, 0.0).sum(axis=0) / np.where(counts, counts, 1)
    return {
        "format": str(group.attrs["format"]),
        "helisweep": __version__,
        "dims": list(group["measurements"].metadata.dimension_names),
        "measurement_labels": [str(v) for v in group["measurement"][...].tolist()],
        "leads": [str(v) for v in group["lead"][...].tolist()],
        "geometry": group["geometry"][...].tolist(),
        "energy": group["energy"][...].tolist(),
        "measurements": measurements.tolist(),
        "status": status.tolist(),
        # mean over the realisations with status done, per (geometry, ..., energy, measurement)
        "mean_of_done": means.tolist(),
        "done_per_point": counts.tolist(),
    }


def main() -> int:
    folder = HERE / f"store-format-{STORE_FORMAT_VERSION}"
    store = folder / "samples.zarr"
    if store.exists():
        print(f"{store} exists: it is the record of what format {STORE_FORMAT!r} wrote and is "
              f"not replaced. Delete it first (git rm -r) only if that record is wrong.",
              file=sys.stderr)
        return 1
    folder.mkdir(parents=True, exist_ok=True)
    cfg = parse_config(CONFIG, source="make_format_store.py")
    client = local_client(1)
    try:
        run_sweep(cfg, client=client, store_path=store, progress=False)
    finally:
        cluster = client.cluster
        client.close()
        cluster.close()
    values = expected_values(store)
    (folder / "expected.json").write_text(json.dumps(values, indent=1) + "\n", encoding="utf-8")
    size = sum(p.stat().st_size for p in store.rglob("*") if p.is_file())
    print(f"wrote {store} ({size / 1024:.1f} kB, format {values['format']!r}) and expected.json")
    return 0


if __name__ == "__main__":
    sys.exit(main())
