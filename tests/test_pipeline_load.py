"""Pipeline loading: schema validation, safe YAML, the frozen spec."""

import dataclasses
import json
import pathlib

import jsonschema
import pytest

from invariance.errors import SpecificationError
from invariance.pipeline import load_pipeline, schema
from invariance.spec.load import parse_yaml

from conftest import hs_doc


def _walk(node, path="#"):
    if isinstance(node, dict):
        if node.get("type") == "object" or "properties" in node:
            yield path, node
        for k, v in node.items():
            yield from _walk(v, f"{path}/{k}")
    elif isinstance(node, list):
        for i, v in enumerate(node):
            yield from _walk(v, f"{path}/{i}")


def test_schema_is_valid_and_closed_everywhere():
    jsonschema.Draft202012Validator.check_schema(schema())
    for path, node in _walk(schema()):
        if "properties" in node:
            assert node.get("additionalProperties") is False, path


def test_defaults_and_bifactor_family(hs_dir):
    spec = load_pipeline(hs_doc(str(hs_dir / "hs.csv")))
    assert spec.structure.family == "correlated"
    assert spec.levels == ("configural", "metric", "scalar", "strict")
    assert spec.rule.criteria == ("cfi", "rmsea")
    assert "Chen (2007)" in spec.rule.source
    assert spec.stop_at_failure is True and spec.estimator == "ml"
    doc = hs_doc("hs.csv")
    doc["model"]["general"] = "g"
    assert load_pipeline(doc, base_dir=hs_dir).structure.family == "bifactor"
    doc["model"]["family"] = "second_order"
    assert load_pipeline(doc, base_dir=hs_dir).structure.family == "second_order"


def test_spec_is_frozen(hs_dir):
    spec = load_pipeline(hs_doc("hs.csv"), base_dir=hs_dir)
    with pytest.raises(dataclasses.FrozenInstanceError):
        spec.levels = ("configural",)
    with pytest.raises(TypeError):
        spec.document["data"]["group"] = "sex"
    assert spec.to_dict()["data"]["group"] == "school"


def test_paths_relative_to_pipeline_file(tmp_path, hs_frame):
    sub = tmp_path / "a" / "b"
    sub.mkdir(parents=True)
    hs_frame.to_csv(tmp_path / "a" / "hs.csv", index=False)
    p = sub / "p.yaml"
    p.write_text(json.dumps(hs_doc("../hs.csv", output={"folder": "out"})))  # JSON is YAML
    spec = load_pipeline(p)
    assert spec.data_path == (tmp_path / "a" / "hs.csv").resolve()
    assert spec.output_folder == (sub / "out").resolve()


@pytest.mark.parametrize(
    "edit, message",
    [
        (lambda d: d.update(colour="red"), "Unknown key 'colour' in the pipeline; allowed keys: alignment, compare, data, decision"),
        (lambda d: d["data"].update(grp="x"), "Unknown key 'grp' in section 'data'; allowed keys: format, group"),
        (lambda d: d.update(decision={"cutoffs": {"cfi": 0.01, "gfi": 0.01}}), "Unknown key 'gfi'"),
        (lambda d: d.update(decision={"cutoffs": {"srmr": {"weak": 0.03}}}), "Unknown key 'weak'"),
        (lambda d: d["model"].update(released=[{"parameter": "intercept", "item": "x1", "grp": ["a"]}]), "Unknown key 'grp'"),
        (lambda d: d["data"].pop("group"), "Required key 'group' is missing from section 'data'"),
        (lambda d: d.update(estimator="gls"), "estimator"),
        (lambda d: d.update(levels=["metric", "scalar"]), "must start with configural"),
        (lambda d: d.update(levels=["configural", "strict", "metric"]), "must be in order"),
        (lambda d: d.update(decision={"alpha": 1.5}), "decision.alpha"),
        (lambda d: d["model"].update(family="bifactor"), "needs model.general"),
        (lambda d: d["model"].update(released=[{"parameter": "intercept", "item": "zz"}]), "'zz'"),
        (lambda d: d.update(decision={"criteria": ["cfi", "gamma"]}), "decision.criteria"),
    ],
)
def test_bad_documents_name_the_problem(hs_dir, edit, message):
    doc = hs_doc("hs.csv")
    edit(doc)
    with pytest.raises(SpecificationError) as err:
        load_pipeline(doc, base_dir=hs_dir)
    assert message in str(err.value)
    assert "\n" not in str(err.value)


def test_yaml_object_tags_are_refused_not_executed(tmp_path):
    target = tmp_path / "pwned.txt"
    text = f"data: !!python/object/apply:os.system ['touch {target}']\n"
    with pytest.raises(SpecificationError, match="refused YAML tag"):
        parse_yaml(text)
    assert not target.exists()
    with pytest.raises(SpecificationError, match="not valid YAML"):
        parse_yaml("data: [unclosed\n")
    with pytest.raises(SpecificationError, match="not a mapping"):
        parse_yaml("- a\n- b\n")


def test_missing_codes_global_and_per_column(hs_dir):
    spec = load_pipeline(hs_doc("hs.csv", data={"path": "hs.csv", "group": "school", "missing": [-9, "NA"]}), base_dir=hs_dir)
    assert spec.missing == (-9, "NA")
    spec = load_pipeline(hs_doc("hs.csv", data={"path": "hs.csv", "group": "school", "missing": {"x1": [0]}}), base_dir=hs_dir)
    assert dict(spec.missing) == {"x1": (0,)}


def test_committed_demo_pipelines_validate():
    root = pathlib.Path(__file__).resolve().parents[1]
    for p in sorted((root / "pipelines").glob("*.yaml")):
        spec = load_pipeline(p)
        assert spec.structure.family == "bifactor"
        assert spec.data_path.is_file()
