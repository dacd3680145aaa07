"""Validation of the partial: and structural: pipeline sections (Python side)."""

import pytest

from invariance.errors import SpecificationError
from invariance.spec.options import partial_settings, structural_settings


def test_partial_defaults_and_enabling():
    assert partial_settings(None).enabled is False
    s = partial_settings({"alpha": 0.01, "correction": "bonferroni"})
    assert s.enabled and s.alpha == 0.01 and s.correction == "bonferroni" and s.max_releases == 10
    assert partial_settings({"enabled": False}).enabled is False


@pytest.mark.parametrize(
    "section, match",
    [
        ({"alfa": 0.05}, "unknown key 'alfa'"),
        ({"correction": "fdr"}, "partial.correction"),
        ({"release_in": "some"}, "partial.release_in"),
        ({"alpha": 1.5}, "partial.alpha"),
        ({"max_releases": -1}, "max_releases"),
    ],
)
def test_partial_bad_values(section, match):
    with pytest.raises(SpecificationError, match=match):
        partial_settings(section)


def test_structural_levels():
    assert structural_settings(None) == ()
    assert structural_settings({"levels": ["variances", "means"]}) == ("variances", "means")
    with pytest.raises(SpecificationError, match="order"):
        structural_settings({"levels": ["means", "variances"]})
    with pytest.raises(SpecificationError, match="unknown level"):
        structural_settings({"levels": ["slopes"]})
    with pytest.raises(SpecificationError, match="unknown key"):
        structural_settings({"steps": []})
