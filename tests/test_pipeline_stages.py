"""Extending a run with a stage: one call, its dict merged into results.json."""

import pytest

import invariance
from invariance.pipeline import stages

from conftest import hs_doc


def test_added_stage_sees_fits_and_its_result_is_merged(hs_dir):
    seen = {}

    def extra(spec, state):
        seen["levels"] = sorted(state.fits)
        # a stage returns its results and a new state; the old one is never changed
        new = state.update(extra={**state.extra, "mine": 1}).warn("extra: seen")
        assert "mine" not in state.extra and "extra: seen" not in state.warnings
        return {"extra_section": {"n_fits": len(state.fits)}}, new

    before = stages.STAGES
    table = invariance.pipeline.with_stage("extra", extra, after="fits")
    names = [n for n, _ in table]
    assert names.index("extra") == names.index("fits") + 1
    assert stages.STAGES is before and "extra" not in dict(stages.STAGES)  # the default table is immutable
    d = invariance.run(hs_doc(str(hs_dir / "hs.csv"), levels=["configural", "metric"]), quiet=True,
                       stages=table).to_dict()
    assert seen["levels"] == ["configural", "metric"]
    assert d["extra_section"] == {"n_fits": 2}
    assert "extra: seen" in d["warnings"]


def test_with_stage_rejects_unknown_anchor():
    with pytest.raises(ValueError, match="Unknown stage"):
        invariance.pipeline.with_stage("x", lambda s, st: ({}, st), after="nope")
