"""MkDocs hook: render the configuration reference from the pydantic models in ``leanset.config``.

A page holding the marker ``<!-- config-reference -->`` gets, in its place, one table per config
section with every key's type, default, allowed range and description, read from the models'
fields. A key without a ``description=`` is reported as a warning, which fails ``mkdocs build --strict``,
so the reference cannot fall behind the code.
"""

from __future__ import annotations

import json
import logging
import types
import typing
from pathlib import PurePath

from pydantic import BaseModel
from pydantic.fields import FieldInfo
from pydantic_core import PydanticUndefined

MARKER = "<!-- config-reference -->"
log = logging.getLogger("mkdocs.plugins.leanset_config_reference")

_BOUNDS = {"gt": ">", "ge": "≥", "lt": "<", "le": "≤", "min_length": "at least {} item(s)"}


def _type_name(tp) -> str:
    origin, args = typing.get_origin(tp), typing.get_args(tp)
    if origin is typing.Annotated:
        return _type_name(args[0])
    if origin is typing.Literal:
        return "one of " + ", ".join(f"`{a}`" for a in args)
    if origin in (typing.Union, types.UnionType):
        names = [_type_name(a) for a in args if a is not type(None)]
        return " or ".join(names) + (" or none" if type(None) in args else "")
    if origin in (list, dict):
        return f"{origin.__name__} of " + ", ".join(_type_name(a) for a in args)
    if tp is typing.Any:
        return "any"
    if isinstance(tp, type) and issubclass(tp, PurePath):
        return "path"
    return getattr(tp, "__name__", str(tp))


def _bounds(field: FieldInfo) -> str:
    parts, stack = [], [field.annotation, *field.metadata]
    while stack:
        item = stack.pop(0)
        if isinstance(item, FieldInfo):
            stack.extend(item.metadata)
            continue
        for a in typing.get_args(item):
            stack.append(a)
        for attr, fmt in _BOUNDS.items():
            value = getattr(item, attr, None)
            if value is not None and not isinstance(item, type):
                parts.append(fmt.format(value) if "{}" in fmt else f"{fmt} {value}")
    return ", ".join(dict.fromkeys(parts))


def _default(field: FieldInfo) -> str:
    if field.is_required():
        return "required"
    value = field.default_factory() if field.default_factory is not None else field.default
    if value is None or value is PydanticUndefined:
        return "none"
    if isinstance(value, BaseModel):
        return "its section's defaults"
    if isinstance(value, PurePath):
        value = str(value)
    return f"`{json.dumps(value, ensure_ascii=False)}`" if isinstance(value, (bool, list, dict)) else f"`{value}`"


def _row(key: str, field: FieldInfo, missing: list[str]) -> str:
    if not field.description:
        missing.append(key)
    text = " ".join((field.description or "").split()).replace("|", "\\|")
    bounds = _bounds(field)
    return f"| `{key}` | {_type_name(field.annotation)} | {_default(field)} | {bounds} | {text} |"


def render(model: type[BaseModel]) -> tuple[str, list[str]]:
    """Markdown tables for ``model`` (the top-level ``Config``) and the keys lacking a description."""
    header = "| key | type | default | range | meaning |\n|---|---|---|---|---|"
    top, sections, missing = [], [], []
    for name, field in model.model_fields.items():
        sub = field.annotation
        if isinstance(sub, type) and issubclass(sub, BaseModel):
            if not field.description:
                missing.append(name)
            rows = [_row(f"{name}.{k}", f, missing) for k, f in sub.model_fields.items()]
            sections.append(f"## `{name}`\n\n{field.description or ''}\n\n{header}\n" + "\n".join(rows))
        else:
            top.append(_row(name, field, missing))
    parts = sections + ([f"## Top-level keys\n\n{header}\n" + "\n".join(top)] if top else [])
    return "\n\n".join(parts) + "\n", missing


def on_page_markdown(markdown: str, page, config, files) -> str:
    if MARKER not in markdown:
        return markdown
    from leanset.config import Config

    text, missing = render(Config)
    for key in missing:
        log.warning("config key '%s' has no description: add description= to its Field in src/leanset/config.py", key)
    return markdown.replace(MARKER, text)
