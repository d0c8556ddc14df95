"""The run-time tunables: the config keys marked TUNABLE (twistrate.service.config), as one model a client
changes with the control op `set`, validated against the same types and bounds as the config file.

`Tunables` is built from the marked keys, so the schema is written once; `apply_set(current, params)`
validates a request (all or nothing) and returns the new values, or raises ControlError("bad_argument")
naming the parameter, the value and the accepted range.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import replace
from typing import Annotated, Any

from pydantic import ValidationError, create_model, model_validator

from twistrate.service import config as cfg
from twistrate.service import config_sections as sections
from twistrate.service.wire.constants import DAMPING_POLICIES, E_BAD_ARGUMENT
from twistrate.solver.errors import ControlError
from twistrate.solver.options import HealthThresholds, SolverOptions
from twistrate.solver.validation import bounds_text, clean


def _marked() -> dict[str, tuple[str, sections.Tunable, Any]]:
    """{key: (section, mark, annotation with its constraints)} of every TUNABLE key, in config order."""
    out: dict[str, tuple[str, sections.Tunable, Any]] = {}
    for section, info in cfg.ServiceConfig.model_fields.items():
        for key, field in getattr(info.annotation, "model_fields", {}).items():  # [keepout]: a plain table
            mark = next((m for m in field.metadata if isinstance(m, sections.Tunable)), None)
            if mark is None:
                continue
            if key in out:
                raise TypeError(f"tunable {key!r} marked in both [{out[key][0]}] and [{section}]")
            constraints = [m for m in field.metadata if not isinstance(m, sections.Tunable)]
            annotation = mark.annotation if mark.annotation is not None else (
                Annotated[(field.annotation, *constraints)] if constraints else field.annotation)
            out[key] = (section, mark, annotation)
    return out


#: {tunable: (config section, marker, type with bounds)}
TUNABLE_KEYS = _marked()
#: the tunables that are fields of SolverOptions (the [solver] section's)
SOLVER_TUNABLES = tuple(k for k, (section, _, _) in TUNABLE_KEYS.items() if section == "solver")
#: the [health] tunables, in HealthThresholds' field order
HEALTH_TUNABLES = tuple(k for k, (section, _, _) in TUNABLE_KEYS.items() if section == "health")


class _TunablesBase(sections._Section):
    """Behaviour of the generated Tunables model (fields: every TUNABLE config key; SI units)."""

    @model_validator(mode="after")
    def _ordered(self) -> _TunablesBase:
        sections.check_thresholds_ordered(self)
        return self

    def solver_options(self, base: SolverOptions) -> SolverOptions:
        """`base` with the tunable solver fields replaced."""
        return replace(base, **{k: getattr(self, k) for k in SOLVER_TUNABLES})

    def health_thresholds(self) -> HealthThresholds:
        return HealthThresholds(*(getattr(self, k) for k in HEALTH_TUNABLES))

    @property
    def tool_linear_max(self) -> float:
        """The tool-point linear speed cap in effect, m/s (the reduced one in reduced-speed mode)."""
        t: Any = self
        return min(t.linear_max, t.reduced_linear_max) if t.reduced_speed else t.linear_max


#: The parameters a client may change while the service runs (control op `set`); names, types and bounds
#: are the config keys of the same name (docs/protocol.md, section 8.4).
Tunables = create_model("Tunables", __base__=_TunablesBase,
                        **{k: (annotation, ...) for k, (_, _, annotation) in TUNABLE_KEYS.items()})


def tunables_of(config: cfg.ServiceConfig) -> Any:
    """The tunable values a configuration starts with."""
    values = {}
    for key, (section, mark, _) in TUNABLE_KEYS.items():
        values[key] = getattr(getattr(config, section), mark.value_from or key)
    return Tunables(**values)


def _range_text(name: str) -> str:
    """Accepted values of a tunable, from its field constraints."""
    info = Tunables.model_fields[name]
    if info.annotation is bool:
        return "true or false"
    if name == "damping":
        return f"one of {', '.join(DAMPING_POLICIES)}"
    return f"a number {bounds_text(list(info.metadata))}"


def tunable_ranges() -> dict[str, str]:
    """{name: accepted values} of every tunable (for messages and documentation)."""
    return {name: _range_text(name) for name in Tunables.model_fields}


def apply_set(current: Any, params: Mapping[str, object]) -> Any:
    """Validate a `set` request against the bounds and return the new tunables (all or nothing).

    Raises ControlError(E_BAD_ARGUMENT) naming the parameter, the value and the accepted range.
    """
    if not params:
        raise ControlError(E_BAD_ARGUMENT, "params: got {}; accepted: at least one parameter")
    for name, value in params.items():
        if name not in Tunables.model_fields:
            raise ControlError(E_BAD_ARGUMENT, f"params.{name}: got {value!r}; accepted: a tunable name, "
                               f"one of {', '.join(Tunables.model_fields)}")
    try:
        return Tunables.model_validate({**current.model_dump(), **params})
    except ValidationError as exc:
        err = exc.errors(include_url=False)[0]
        loc = err["loc"]
        if loc:
            name = str(loc[0])
            raise ControlError(E_BAD_ARGUMENT, f"params.{name}: got {params.get(name, err['input'])!r}; "
                               f"accepted: {_range_text(name)}") from None
        raise ControlError(E_BAD_ARGUMENT,
                           f"params: got {dict(params)!r}; accepted: {clean(err['msg'])}") from None
