"""The one exception hierarchy of twistrate: every error names the field, the value and what is accepted."""

from __future__ import annotations


class TwistrateError(Exception):
    """Base of every error twistrate raises on purpose."""


class ModelError(TwistrateError):
    """An arm description (TOML, DH table, URDF) is invalid or unsupported."""


class InputError(TwistrateError):
    """A value handed to the solver or the service is malformed (non-finite, wrong shape, out of range)."""


class ConfigError(TwistrateError):
    """A service or client configuration is invalid."""


class WireError(TwistrateError):
    """A wire message cannot be decoded or fails its checks. `reason` is a short stable counter key."""

    def __init__(self, reason: str, message: str) -> None:
        super().__init__(message)
        self.reason = reason


class ControlError(TwistrateError):
    """A control request is refused (no lease, bad parameter, wrong state). `code` is stable."""

    def __init__(self, code: str, message: str) -> None:
        super().__init__(message)
        self.code = code


def field_error(cls: type[TwistrateError], field: str, value: object, accepted: str) -> TwistrateError:
    """Build an error of class `cls` in the house style: field, offending value, what is accepted."""
    shown = repr(value)
    if len(shown) > 80:
        shown = shown[:77] + "..."
    return cls(f"{field}: got {shown}; accepted: {accepted}")
