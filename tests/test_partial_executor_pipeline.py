"""The partial-invariance LR verification runs its refits on the executor the run is given
(issue 8: same executor as the batch backend). Checked against the serial run: identical
decisions and releases (a plain equality, no reference value)."""

from __future__ import annotations

import pathlib

import invariance
from invariance.pipeline.batch.executor import DaskExecutor

ROOT = pathlib.Path(__file__).resolve().parents[1]


class _CountingExecutor:
    def __init__(self):
        self.calls = 0

    def map(self, fn, *its):
        self.calls += 1
        return map(fn, *its)


def _pipeline(tmp_path):
    import yaml

    doc = yaml.safe_load((ROOT / "pipelines" / "shift_outlook_by_site_partial.yaml").read_text())
    doc["data"]["path"] = str(ROOT / "examples" / "shift_outlook.csv")
    doc["partial"].update({"verify": True, "verify_top": 2, "until": "holds"})
    doc.pop("output", None)
    return doc


def test_refits_go_through_the_given_executor(tmp_path):
    doc = _pipeline(tmp_path)
    serial = invariance.run(doc, quiet=True, write=False).to_dict()
    counting = _CountingExecutor()
    via = invariance.run(doc, quiet=True, write=False, executor=counting).to_dict()
    assert counting.calls > 0
    strip = lambda d: [(lv["level"], lv["decision"], [(r["parameter"], r["item"]) for r in lv["released"]]) for lv in d["levels"]]
    assert strip(via) == strip(serial)


def test_refits_on_a_local_dask_cluster(tmp_path):
    doc = _pipeline(tmp_path)
    serial = invariance.run(doc, quiet=True, write=False).to_dict()
    with DaskExecutor(workers=2) as ex:
        via = invariance.run(doc, quiet=True, write=False, executor=ex).to_dict()
    assert [f["item"] for f in via["flagged"]] == [f["item"] for f in serial["flagged"]]
