"""The one translator of pydantic validation errors into our house style: `key: got value; accepted: ...`.

Used by every file format we validate with pydantic (the TOML arm format here in the solver, the service
configuration, profiles): the key path (list items as `[i]`, or named by the caller's hook), the value,
and what is accepted, read from the model itself (the known keys of the table, with the nearest one
suggested for a typo; the bounds of a number; the choices of an enumeration; the length of a list).
"""

from __future__ import annotations

import difflib
import typing
from collections.abc import Callable, Mapping
from typing import Any

from pydantic import BaseModel

#: What a value of the wrong type should have been, by pydantic error type (common wording).
ACCEPTED_BY_TYPE: dict[str, str] = {
    "float_type": "a number",
    "int_type": "an integer",
    "int_from_float": "an integer",
    "finite_number": "a finite number",
    "string_type": "a string in quotes",
    "bool_type": "true or false",
    "list_type": "a list [..]",
    "model_type": "a table",
    "dict_type": "a table",
    "model_attributes_type": "a table",
    "missing": "a value (this key is required)",
}
#: pydantic error types of a number outside its bounds.
RANGE_ERRORS = ("less_than_equal", "less_than", "greater_than", "greater_than_equal", "finite_number")
#: How alike a key must be to a known one to be suggested (difflib ratio).
SUGGEST_CUTOFF = 0.6

#: (location so far, list index) -> the text naming that list item, or None for `[i]`
ItemLabel = Callable[[tuple[Any, ...], int], str | None]
#: (location, pydantic error type) -> what is accepted there, or None for the general wording
AcceptedAt = Callable[[tuple[Any, ...], str], str | None]


def clean(msg: str) -> str:
    """A pydantic message made into the 'accepted' part of ours."""
    for prefix in ("Value error, ", "Input should be "):
        if msg.startswith(prefix):
            msg = msg[len(prefix):]
    return msg


def _models_in(annotation: Any) -> list[type[BaseModel]]:
    """The pydantic models inside an annotation (through Optional, list, Annotated, unions)."""
    if isinstance(annotation, type) and issubclass(annotation, BaseModel):
        return [annotation]
    out: list[type[BaseModel]] = []
    for arg in typing.get_args(annotation):
        out += _models_in(arg)
    return out


def _constraints(annotation: Any, metadata: list[Any]) -> list[Any]:
    """Every constraint object of a field: its own metadata and that of Annotated types inside it."""
    flat: list[Any] = []
    for meta in metadata:  # a FieldInfo inside Annotated carries its constraints in .metadata
        flat += list(getattr(meta, "metadata", None) or [meta])
    if typing.get_origin(annotation) is typing.Annotated:
        flat += _constraints(None, list(annotation.__metadata__))
    for arg in typing.get_args(annotation):
        if arg is not None and not isinstance(arg, (str, int, float)):
            flat += _constraints(arg, [])
    return flat


def bounds_text(constraints: list[Any]) -> str | None:
    """'>= lo and <= hi' from annotated-types constraints, or None when unbounded."""
    parts = []
    for attrs in ((("ge", ">="), ("gt", ">")), (("le", "<="), ("lt", "<"))):
        for attr, op in attrs:
            for meta in constraints:
                value = getattr(meta, attr, None)
                if value is not None:
                    parts.append(f"{op} {value:g}")
                    break
            else:
                continue
            break
    return " and ".join(parts) or None


def field_constraints(model: type[BaseModel], loc: tuple[Any, ...]) -> list[Any] | None:
    """The constraints of the field at `loc` (keys; list indices skipped), or None if there is none."""
    current: list[type[BaseModel]] = [model]
    info = None
    for part in loc:
        if isinstance(part, int):
            continue
        info = next((m.model_fields[part] for m in current if part in m.model_fields), None)
        if info is None:
            return None
        current = _models_in(info.annotation)
    return None if info is None else _constraints(info.annotation, list(info.metadata))


def table_keys(model: type[BaseModel], loc: tuple[Any, ...]) -> list[str]:
    """The keys the table at `loc` accepts (empty when `loc` names no table)."""
    current: list[type[BaseModel]] = [model]
    for part in loc:
        if isinstance(part, int):
            continue
        info = next((m.model_fields[part] for m in current if part in m.model_fields), None)
        if info is None:
            return []
        current = _models_in(info.annotation)
    return [key for m in current for key in m.model_fields]


def key_text(loc: tuple[Any, ...], item_label: ItemLabel | None = None) -> str:
    """`section.key[i]` for a location; list items named by `item_label` where it has a name."""
    parts: list[str] = []
    for k, part in enumerate(loc):
        if isinstance(part, int):
            label = item_label(loc[:k], part) if item_label is not None else None
            if label is not None and parts:
                parts[-1] = label
            elif parts:
                parts[-1] += f"[{part}]"
            else:
                parts.append(f"[{part}]")
        else:
            parts.append(str(part))
    return ".".join(parts)


def _shown(value: object) -> str:
    shown = repr(value)
    return shown if len(shown) <= 80 else shown[:77] + "..."


def describe(err: Mapping[str, Any], model: type[BaseModel], *, item_label: ItemLabel | None = None,
             accepted_by_type: Mapping[str, str] | None = None, accepted_at: AcceptedAt | None = None,
             whole: str = "(top level)") -> str:
    """One pydantic error (an entry of ValidationError.errors()) of `model` in the house style.

    item_label : names list items (e.g. a joint by index and name). accepted_by_type : overrides of
    ACCEPTED_BY_TYPE for this format. accepted_at : the format's own wording at particular keys.
    whole : how to name the document itself.
    """
    loc = tuple(err["loc"])
    key = key_text(loc, item_label) or whole
    kind = err["type"]
    value = err.get("input")
    ctx = err.get("ctx") or {}
    wording = {**ACCEPTED_BY_TYPE, **(accepted_by_type or {})}
    special = accepted_at(loc, kind) if accepted_at is not None else None
    if special is not None:
        return f"{key}: missing; accepted: {special}" if kind == "missing" else \
            f"{key}: got {_shown(value)}; accepted: {special}"
    if kind == "extra_forbidden":
        known = table_keys(model, loc[:-1])
        near = difflib.get_close_matches(str(loc[-1]), known, n=1, cutoff=SUGGEST_CUTOFF)
        hint = f"; did you mean {near[0]!r}?" if near else ""
        return (f"{key}: got {_shown(value)}; accepted: a known key ({', '.join(known)}); remove or "
                f"rename it{hint}")
    if kind == "missing":
        return f"{key}: missing; accepted: {wording['missing']}"
    if kind == "value_error" and not any(isinstance(p, str) for p in loc[1:]):
        return f"{key + ': ' if loc else ''}{clean(err['msg'])}"
    constraints = field_constraints(model, loc) or []
    if kind in RANGE_ERRORS:
        bounds = bounds_text(constraints)
        accepted = f"a finite number {bounds}" if bounds else wording.get(kind, "a finite number")
    elif kind == "literal_error":
        accepted = f"one of {ctx.get('expected', clean(err['msg']))}"
    elif kind in ("too_short", "too_long"):
        lo = next((m.min_length for m in constraints if getattr(m, "min_length", None) is not None), None)
        hi = next((m.max_length for m in constraints if getattr(m, "max_length", None) is not None), None)
        if lo is not None and lo == hi:
            accepted = f"a list of exactly {lo} items"
        else:
            accepted = "a list of " + " and ".join(
                t for t in (lo is not None and f"at least {lo}", hi is not None and f"at most {hi}") if t
            ) + " items"
    elif kind == "string_too_short":
        accepted = "a non-empty string"
    else:
        accepted = wording.get(kind, clean(err["msg"]))
    return f"{key}: got {_shown(value)}; accepted: {accepted}"


def describe_all(errors: list[Mapping[str, Any]], model: type[BaseModel], **kw: Any) -> list[str]:
    """describe() for each error, in order, without repeats."""
    out: list[str] = []
    for err in errors:
        text = describe(err, model, **kw)
        if text not in out:
            out.append(text)
    return out


