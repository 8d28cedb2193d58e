"""Fingerprints of sample stores and summaries, for the golden before/after test.

A fingerprint is the SHA-256 of every chunk file of a store (the bytes on disk, compressed and
checksummed as written), of every array's metadata, of the store's attributes except the
per-session provenance (timestamps, host, versions), and of every summary variable's values
and attributes except the summary's own history line. Two stores with equal fingerprints are
bitwise identical in everything a later session reads.

``python tests/golden/fingerprint.py --write`` recomputes ``fingerprints.json``: do that only
when a change to the numbers is intended, and say so in the commit message.
"""

from __future__ import annotations

import hashlib
import json
import sys
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent
ROOT = HERE.parents[1]
REFERENCE = HERE / "fingerprints.json"

#: the configs of the golden test: the two demo configs and a Hall-bar config in a field,
#: with fewer realisations (excluded from the config hash: realisation r is the same sample
#: whatever the total) and, for the Hall bar, a smaller grid, so the test takes about a minute.
#: The measurement key is put back to its old name ("report", still read) so that the stored
#: config text is the one the reference was made from.
CASES = {
    "demo": ("configs/demo.toml", {'realisations = 16': 'realisations = 2',
                                   'labels = [': 'report = ['}),
    "demo-hbar-gate": ("configs/demo-hbar-gate.toml", {'realisations = 6': 'realisations = 2',
                                                       'labels = [': 'report = ['}),
    "hallbar-field": ("configs/example-hallbar-field.toml", {
        'labels = [': 'report = [',
        'realisations = 40': 'realisations = 2',
        'energy = { start = -6.0, stop = 6.0, step = 2.0 }': 'energy = [-2.0, 4.0]',
        'b_perp = [-1.0, -0.5, 0.0, 0.5, 1.0]': 'b_perp = [0.0, 0.5]',
        'disorder_strength = [0.5, 1.0]': 'disorder_strength = [1.0]',
    }),
}
#: store attributes written per session (timestamps, host, library versions)
VOLATILE_STORE_ATTRS = ("created", "sessions")
#: summary attributes that carry a timestamp or the sessions
VOLATILE_SUMMARY_ATTRS = ("history", "store_sessions")
WORKERS = 2


def case_text(name: str) -> tuple[str, Path]:
    """The config text of a case (its run directory is never used: stores go to ``workdir``)."""
    rel, changes = CASES[name]
    path = ROOT / rel
    text = path.read_text()
    for old, new in changes.items():
        assert old in text, (rel, old)
        text = text.replace(old, new)
    return text, path.parent


def _digest(data: bytes) -> str:
    return hashlib.sha256(data).hexdigest()


def store_fingerprint(path: Path) -> dict[str, str]:
    """Chunk bytes, array metadata and stable attributes of a Zarr store, by relative path."""
    path = Path(path)
    out = {}
    for f in sorted(path.rglob("*")):
        if not f.is_file():
            continue
        rel = f.relative_to(path).as_posix()
        if f.name == "zarr.json":
            meta = json.loads(f.read_text())
            attrs = meta.get("attributes", {})
            for key in VOLATILE_STORE_ATTRS:
                attrs.pop(key, None)
            # a copy of the arrays' own zarr.json files (each fingerprinted here), kept for
            # xarray's one-read opening; its presence is tested in tests/test_integrity.py
            meta.pop("consolidated_metadata", None)
            out[rel] = _digest(json.dumps(meta, sort_keys=True).encode())
        else:
            out[rel] = _digest(f.read_bytes())
    return out


def _canonical(value):
    if isinstance(value, np.ndarray):
        return value.tolist()
    if isinstance(value, np.generic):
        return value.item()
    return value


def summary_fingerprint(ds) -> dict[str, str]:
    """Values (bytes), dtypes, dims and attributes of every variable of a summary Dataset."""
    out = {}
    for name in sorted(map(str, ds.variables)):
        v = ds[name].variable
        data = np.asarray(v.values)
        raw = (json.dumps(data.tolist()).encode() if data.dtype.kind in "OUS"
               else np.ascontiguousarray(data).tobytes())
        head = json.dumps({"dims": list(v.dims), "dtype": str(data.dtype), "shape": data.shape,
                           "attrs": {k: _canonical(a) for k, a in sorted(v.attrs.items())}},
                          sort_keys=True, default=str)
        out[f"var:{name}"] = _digest(head.encode() + raw)
    for key, value in sorted(ds.attrs.items()):
        if key not in VOLATILE_SUMMARY_ATTRS:
            out[f"attr:{key}"] = _digest(json.dumps(_canonical(value), default=str).encode())
    return out


def compute(run, summarize, load_config_text, workdir: Path) -> dict:
    """Run every case with ``run(cfg, store_path)`` and summarise it with ``summarize``."""
    result = {}
    for name in CASES:
        directory = workdir / name
        text, base = case_text(name)
        cfg = load_config_text(text, base)
        store = directory / "samples.zarr"
        run(cfg, store)
        result[name] = {"store": store_fingerprint(store),
                        "summary": summary_fingerprint(summarize(store, base))}
    return result


def _current_api():
    """The package's own entry points (the only part that follows the code's layout)."""
    from pipeline.analysis.summary import summarize
    from pipeline.sweep.clusters import local_client
    from pipeline.sweep.config import parse_config
    from pipeline.sweep.driver import run_sweep

    client = local_client(WORKERS)

    def run(cfg, store):
        run_sweep(cfg, client=client, store_path=store, progress=False)

    def summ(store, base):
        return summarize(store, config_dir=base)

    def load(text, base):
        return parse_config(text, base_dir=base)

    return client, run, summ, load


if __name__ == "__main__":
    import tempfile
    import warnings

    warnings.simplefilter("ignore")
    client, run, summ, load = _current_api()
    try:
        with tempfile.TemporaryDirectory() as tmp:
            fp = compute(run, summ, load, Path(tmp))
    finally:
        cluster = client.cluster
        client.close()
        cluster.close()
    if "--write" in sys.argv:
        REFERENCE.write_text(json.dumps(fp, indent=1, sort_keys=True) + "\n")
        print(f"wrote {REFERENCE}")
    else:
        print(json.dumps(fp, indent=1, sort_keys=True))
