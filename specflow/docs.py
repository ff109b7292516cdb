"""Generate the reference page of the spec format from the pydantic models (never written twice).

``python -m specflow.docs > docs/spec-format.md``; a test checks the committed page is current.
"""

from __future__ import annotations

import typing

from pydantic import BaseModel

from . import spec as S

SECTIONS: list[tuple[str, type[BaseModel]]] = [
    ("[study]", S.StudyMeta),
    ("[data.NAME]", S.Dataset),
    ("[model]", S.Model),
    ("[axes.NAME]", S.Axis),
    ("[axes.NAME.variants.LABEL] and [extra.NAME] (a patch)", S.Patch),
    ("[grid]", S.GridRules),
    ("[[table]]", S.Table),
    ("[package]", S.PackageMeta),
]


def _type_name(ann: typing.Any) -> str:
    origin = typing.get_origin(ann)
    args = typing.get_args(ann)
    if origin is typing.Literal:
        return " | ".join(f'"{a}"' for a in args)
    if origin in (typing.Union, getattr(__import__("types"), "UnionType", None)):
        parts = [_type_name(a) for a in args if a is not type(None)]
        return " | ".join(parts) + (" (optional)" if type(None) in args else "")
    if origin is list:
        return f"list of {_type_name(args[0])}"
    if origin is dict:
        return f"table of {_type_name(args[1])}"
    if isinstance(ann, type):
        if issubclass(ann, BaseModel):
            return "table"
        return {"str": "string", "int": "integer", "float": "number", "bool": "true/false"}.get(ann.__name__, ann.__name__)
    return str(ann)


def _default(field) -> str:
    if field.is_required():
        return "required"
    if field.default_factory is not None:
        v = field.default_factory()
        return "empty" if not v else repr(v)
    return repr(field.default) if field.default is not None else "none"


def reference() -> str:
    lines = ["# The spec format (reference)", "",
             "Generated from the pydantic models in `specflow/spec.py` by `python -m specflow.docs`;",
             "do not edit by hand. Every key not listed here is an error.", ""]
    for title, model in SECTIONS:
        lines += [f"## {title}", "", (model.__doc__ or "").strip().splitlines()[0], "",
                  "| key | type | default | meaning |", "| --- | --- | --- | --- |"]
        for name, f in model.model_fields.items():
            desc = (f.description or "").replace("|", "\\|")
            lines.append(f"| `{name}` | {_type_name(f.annotation).replace('|', '/')} | {_default(f).replace('|', '/')} | {desc} |")
        lines.append("")
    return "\n".join(lines)


if __name__ == "__main__":  # pragma: no cover
    print(reference(), end="")
