"""The recipe's JSON Schema (draft-07) and plain-text descriptions of step kinds.

All are generated from the pydantic models and the step registry, never kept by
hand: the schema for editors (``lotproof schema``), the parameter tables for
``lotproof steps``, and the table of step kinds in the README
(:func:`step_kinds_markdown`; ``tests/test_readme.py`` fails when the README's
copy differs).
"""

from __future__ import annotations

import json
import types
import typing
from typing import Annotated, Any, Literal, Union

from pydantic import BaseModel, ConfigDict, Field, create_model
from pydantic.fields import FieldInfo

from lotproof.runner.recipe.model import NAME_PATTERN, RecipeModel
from lotproof.steps import REGISTRY, SAME, Area, Length, StepKind

__all__ = [
    "SCHEMA_FILE",
    "describe_type",
    "param_rows",
    "recipe_json_schema",
    "schema_text",
    "step_kinds_markdown",
    "takes_text",
]

#: where the repository keeps the generated schema, relative to the project root
SCHEMA_FILE = "recipes/lotproof-recipe.schema.json"


def _step_model(kind: StepKind) -> type[BaseModel]:
    fields: dict[str, Any] = {
        "apply": (Literal[kind.name], Field(description=f"{kind.name}: {kind.summary}")),
        "to": (
            Union[str, list[str]],  # noqa: UP007
            Field(description="the input or earlier step(s) this step is applied to"),
        ),
        "keep": (bool, Field(False, description="save this step's result in the run folder")),
    }
    model_name = "step_" + kind.name.replace("-", "_")
    return create_model(model_name, __base__=kind.params, **fields)


def recipe_json_schema() -> dict[str, Any]:
    """The JSON Schema (draft-07) of ``format: lotproof/1`` recipes."""
    models = [_step_model(REGISTRY[name]) for name in sorted(REGISTRY)]
    step_union = Annotated[Union[tuple(models)], Field(discriminator="apply")]  # type: ignore[valid-type]  # noqa: UP007

    class RecipeSchema(RecipeModel):
        model_config = ConfigDict(title="lotproof recipe (format lotproof/1)")
        steps: dict[Annotated[str, Field(pattern=NAME_PATTERN)], step_union] = Field(  # type: ignore[valid-type]
            description="the named steps"
        )

    schema = RecipeSchema.model_json_schema(ref_template="#/definitions/{model}", mode="validation")
    schema = _draft07(schema)
    schema["definitions"] = schema.pop("$defs", {})
    return {"$schema": "http://json-schema.org/draft-07/schema#", **schema}


def _draft07(node: Any) -> Any:
    """Rewrite the few 2020-12 keywords pydantic emits into their draft-07 forms."""
    if isinstance(node, dict):
        out = {}
        for key, value in node.items():
            if key == "discriminator":
                continue  # an OpenAPI keyword; the const on "apply" says the same
            out[key] = _draft07(value)
        if "const" in out and "enum" in out:
            out.pop("enum")
        return out
    if isinstance(node, list):
        return [_draft07(v) for v in node]
    return node


def schema_text() -> str:
    return json.dumps(recipe_json_schema(), indent=2, ensure_ascii=False, sort_keys=True) + "\n"


def describe_type(annotation: Any) -> str:
    """A short, readable type name for ``lotproof steps``."""
    origin = typing.get_origin(annotation)
    args = typing.get_args(annotation)
    if annotation is Length:
        return "length"
    if annotation is Area:
        return "area"
    if getattr(annotation, "__name__", "") == "Volume":
        return "volume"
    if origin is Literal:
        return " | ".join(str(a) for a in args)
    if origin is Annotated:
        return describe_type(args[0])
    if origin in (Union, types.UnionType):
        parts = [describe_type(a) for a in args if a is not type(None)]
        optional = type(None) in args
        return " | ".join(parts) + (" (optional)" if optional else "")
    if origin in (list, tuple):
        return f"list of {describe_type(args[0])}" if args else "list"
    if isinstance(annotation, type):
        return {"float": "number", "int": "integer", "bool": "true/false", "str": "text"}.get(
            annotation.__name__, annotation.__name__
        )
    return str(annotation)


def _default(info: FieldInfo) -> str:
    if info.is_required():
        return "required"
    value = info.get_default(call_default_factory=True)
    if value is None:
        return "-"
    return str(value)


def param_rows(kind: StepKind) -> list[tuple[str, str, str, str]]:
    """(name, type, default, description) for each parameter of ``kind``."""
    rows = []
    for name, info in kind.params.model_fields.items():
        rows.append((name, describe_type(info.annotation), _default(info), info.description or ""))
    return rows


def takes_text(kind: StepKind) -> str:
    """What ``kind`` takes, one entry per input: ``image or mask``; ``mask, mask, ...``."""
    text = ", ".join(" or ".join(sorted(accepted)) for accepted in kind.takes)
    return text + (", ..." if kind.variadic else "")


def _cell(text: str) -> str:
    return text.replace("|", "\\|").replace("\n", " ")


def step_kinds_markdown() -> str:
    """The table of every registered step kind, as Markdown, in name order.

    Columns: the kind, what it takes and gives, the array dimensions it works
    on, and its one-line summary (the first line of its docstring). The README
    holds a copy between ``<!-- step-kinds:start -->`` and
    ``<!-- step-kinds:end -->``.
    """
    lines = ["| kind | takes | gives | on | does |", "|---|---|---|---|---|"]
    for name in sorted(REGISTRY):
        kind = REGISTRY[name]
        gives = "same as input" if kind.gives == SAME else kind.gives
        dims = ", ".join(f"{d}-D" for d in sorted(kind.ndims))
        cells = [f"`{name}`", takes_text(kind), gives, dims, kind.summary]
        lines.append("| " + " | ".join(_cell(c) for c in cells) + " |")
    return "\n".join(lines) + "\n"
