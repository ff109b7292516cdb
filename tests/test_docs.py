"""The generated reference of the spec format is current, and the JSON Schema matches the models."""

from pathlib import Path

from specflow import docs, spec

ROOT = Path(__file__).resolve().parents[1]


def test_spec_format_reference_is_current():
    committed = (ROOT / "docs" / "spec-format.md").read_text()
    assert committed == docs.reference(), "regenerate: python -m specflow.docs > docs/spec-format.md"


def test_reference_lists_every_key():
    text = docs.reference()
    for _, model in docs.SECTIONS:
        for name in model.model_fields:
            assert f"| `{name}` |" in text


def test_json_schema_has_sections():
    schema = spec.json_schema()
    assert {"study", "data", "model", "axes", "grid", "extra", "table", "package"} <= set(schema["properties"])
    assert schema["additionalProperties"] is False
