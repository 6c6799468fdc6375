"""The report outputs of main @ dad93af (before issue 14) for fabricated old-format
records, kept in this folder; test_report_records.py checks that the reshaped report still
says the same about them.

They were written by this script run at dad93af, from the repository root:
``PYTHONPATH=src:. python tests/study/golden/make_golden.py tests/study/golden``.
"""

import pathlib
import sys

from holonomic.study import parse_config
from tests.study.conftest import tiny_document
from tests.study.fabricate import fabricate


def cases():
    """``(name, config, records)`` of each golden study."""
    doc = tiny_document()
    doc["study"]["seeds"] = 5
    doc["study"]["min_effect"] = 0.01
    c = parse_config(doc)
    yield "classification", c, fabricate(
        c, effects={"fixed_norm": 0.03, "max_norm": -0.02, "none": -0.05}, noise=0.01, seed=3)
    doc = tiny_document()
    doc["study"]["seeds"] = 4
    doc["study"]["baseline"] = "none"
    c = parse_config(doc)
    recs = fabricate(c, "regression", effects={"orthonormal": 0.02}, noise=0.02, seed=5)
    # a failed run: its setting is not eligible
    k = next(k for k, r in recs.items() if r["arm"] == "max_norm" and r["setting_index"] == 1)
    recs[k]["status"] = "failed"
    recs[k]["metrics"] = {m: float("nan") for m in recs[k]["metrics"]}
    yield "regression", c, recs


if __name__ == "__main__":
    from holonomic.study.report import write_outputs

    out = pathlib.Path(sys.argv[1])
    for name, c, recs in cases():
        d = out / name
        d.mkdir(parents=True, exist_ok=True)
        write_outputs(c, d, recs, "invented records", plots=False)
