"""Nothing changes for users: the restructured package writes bitwise the same stores and the
same summaries as the code before it.

The reference (``tests/golden/fingerprints.json``) was computed with the code as it stood
before the package was split into stages (commit 0c77c3f); see ``tests/golden/fingerprint.py``
for what is compared and how to regenerate it when a change of the numbers is intended.
"""

import json
import sys
import warnings
from pathlib import Path

import pytest

sys.path.insert(0, str(Path(__file__).resolve().parent / "golden"))
import fingerprint  # noqa: E402

from pipeline.analysis.summary import summarize  # noqa: E402
from pipeline.sweep.config import parse_config  # noqa: E402
from pipeline.sweep.driver import run_sweep  # noqa: E402


@pytest.fixture(scope="module")
def fingerprints(tmp_path_factory, dask_clients):
    client = dask_clients[fingerprint.WORKERS]

    def run(cfg, store):
        run_sweep(cfg, client=client, store_path=store, progress=False)

    def summ(store, base):
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            return summarize(store, config_dir=base)

    return fingerprint.compute(run, summ, lambda text, base: parse_config(text, base_dir=base),
                               tmp_path_factory.mktemp("golden"))


@pytest.mark.slow
@pytest.mark.filterwarnings("ignore:'\\[measure\\] report' is deprecated")  # the cases use the old key on purpose
@pytest.mark.parametrize("case", sorted(fingerprint.CASES))
def test_store_and_summary_identical_to_reference(fingerprints, case):
    reference = json.loads(fingerprint.REFERENCE.read_text())[case]
    now = fingerprints[case]
    for part in ("store", "summary"):
        changed = sorted(k for k in set(reference[part]) | set(now[part])
                         if reference[part].get(k) != now[part].get(k))
        assert not changed, f"{case}: {part} differs from the reference in {changed}"
