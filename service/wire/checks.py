"""Field checks shared by the encoders and the decoders of the wire codec, and the framing helpers.

Decoders call the `dec_*` checks, which raise ``WireError(reason, message)`` (reason: a key of
REASONS); encoders call the `enc_*` forms of the same checks, which raise ``InputError`` with the same
message (the caller handed in what the protocol cannot carry), so an encoder never emits what its own
decoder would refuse. Messages name the field, the value and what is accepted.
"""

from __future__ import annotations

import math
import threading
import time
from collections.abc import Mapping
from functools import partial
from typing import Any

import msgpack
import numpy as np

from twistrate.service.wire.constants import (
    KINDS,
    MAX_JOINTS,
    MAX_MAP_ENTRIES,
    MAX_NAME_CHARS,
    MAX_TEXT_CHARS,
    PROTOCOL_VERSION,
    SEQ_MAX,
    STAMP_MAX,
)
from twistrate.solver.errors import InputError, WireError, field_error

# msgpack unpack bounds: lengths beyond these fail inside the unpacker, before any allocation.
# "hot" for twist, joints and command (short strings, joint arrays, small maps); "wide" for the rest.
_HOT_MAX_STR = MAX_NAME_CHARS
_HOT_MAX_ARRAY = MAX_JOINTS
_HOT_MAX_MAP = 16
_WIDE_MAX_STR = MAX_TEXT_CHARS * 4  # UTF-8 bytes of MAX_TEXT_CHARS characters
_WIDE_MAX_ARRAY = 256
_WIDE_MAX_MAP = MAX_MAP_ENTRIES

HEADER_KEYS = ("proto", "kind", "seq", "stamp_ns")


def wire_fail(reason: str, field_name: str, value: object, accepted: str) -> WireError:
    """A WireError in the house style: field, offending value, what is accepted."""
    return field_error(partial(WireError, reason), field_name, value, accepted)  # type: ignore[arg-type,return-value]


def input_fail(field_name: str, value: object, accepted: str) -> InputError:
    return field_error(InputError, field_name, value, accepted)  # type: ignore[return-value]


def now_ns() -> int:
    """The sender's stamp: wall-clock nanoseconds (informative only; watchdogs use receive time)."""
    return time.time_ns()


def unpack(data: bytes, cap: int, kind: str, hot: bool) -> dict:
    """Size-check then unpack one msgpack map; raise WireError oversize / not_msgpack / bad_type."""
    if type(data) is not bytes:
        if isinstance(data, (bytearray, memoryview)):
            data = bytes(data)
        else:
            raise wire_fail("bad_type", kind, type(data).__name__, "bytes")
    if len(data) > cap:
        raise wire_fail("oversize", kind, f"{len(data)} bytes", f"at most {cap} bytes")
    try:
        if hot:
            m = msgpack.unpackb(data, max_str_len=_HOT_MAX_STR, max_bin_len=0, max_array_len=_HOT_MAX_ARRAY,
                                max_map_len=_HOT_MAX_MAP, max_ext_len=0)
        else:
            m = msgpack.unpackb(data, max_str_len=_WIDE_MAX_STR, max_bin_len=0, max_array_len=_WIDE_MAX_ARRAY,
                                max_map_len=_WIDE_MAX_MAP, max_ext_len=0)
    except ValueError as exc:  # msgpack's FormatError, ExtraData, StackError, limits, bad UTF-8
        text = str(exc)
        if "map key" in text:  # strict_map_key: only str (and bin, bounded to b"") keys
            raise wire_fail("bad_type", kind, text, "a map with string keys") from None
        if "exceeds max" in text:
            raise wire_fail("oversize", kind, text,
                        "arrays, maps and strings within the protocol's bounds") from None
        raise wire_fail("not_msgpack", kind, f"{len(data)} bytes", "exactly one msgpack map") from None
    except Exception:  # anything else the unpacker can raise on hostile bytes
        raise wire_fail("not_msgpack", kind, f"{len(data)} bytes", "exactly one msgpack map") from None
    if type(m) is not dict:
        raise wire_fail("bad_type", kind, type(m).__name__, "a msgpack map")
    return m


def check_header(m: dict, kind: str) -> None:
    """proto == PROTOCOL_VERSION and kind == `kind` (checked before the key set)."""
    proto = m.get("proto")
    if type(proto) is not int or proto != PROTOCOL_VERSION:
        if "proto" not in m:
            raise wire_fail("missing_field", f"{kind}.proto", None, f"protocol version {PROTOCOL_VERSION}")
        raise wire_fail("bad_version", f"{kind}.proto", proto, f"protocol version {PROTOCOL_VERSION}")
    got = m.get("kind")
    if got != kind:
        if "kind" not in m:
            raise wire_fail("missing_field", f"{kind}.kind", None, f"{kind!r}")
        if type(got) is not str:
            raise wire_fail("bad_type", f"{kind}.kind", got, f"the string {kind!r}")
        if got not in KINDS:
            raise wire_fail("unknown_kind", f"{kind}.kind", got, f"one of {', '.join(KINDS)}")
        raise wire_fail("kind_mismatch", f"{kind}.kind", got, f"{kind!r} on this topic/socket")


def key_error(m: dict, kind: str, required: frozenset[str], optional: frozenset[str]) -> WireError:
    missing = sorted(required - m.keys())
    if missing:
        return wire_fail("missing_field", f"{kind}.{missing[0]}", None,
                     f"required fields {', '.join(sorted(required))}")
    extra = sorted(str(k) for k in m.keys() - required - optional)
    allowed = sorted(required | optional)
    return wire_fail("extra_field", f"{kind}.{extra[0]}", m.get(extra[0]),
                 f"only the fields {', '.join(allowed)}")


def dec_int(v: object, name: str, lo: int, hi: int) -> int:
    if type(v) is not int:
        raise wire_fail("bad_type", name, v, f"an integer in [{lo}, {hi}]")
    if v < lo or v > hi:
        raise wire_fail("bad_value", name, v, f"an integer in [{lo}, {hi}]")
    return v


def dec_num(v: object, name: str, lo: float, hi: float) -> float:
    t = type(v)
    if t is not float and t is not int:
        raise wire_fail("bad_type", name, v, "a number (float or integer; not a bool)")
    if not lo <= v <= hi:  # type: ignore[operator]
        if not math.isfinite(v):  # type: ignore[arg-type]
            raise wire_fail("non_finite", name, v, f"a finite number in [{lo}, {hi}]")
        raise wire_fail("too_large", name, v, f"a number in [{lo}, {hi}]")
    return float(v)  # type: ignore[arg-type]


def dec_str(v: object, name: str, max_chars: int, choices: tuple[str, ...] | None = None,
         allow_empty: bool = False) -> str:
    if type(v) is not str:
        raise wire_fail("bad_type", name, v, "a string")
    if choices is not None:
        if v not in choices:
            raise wire_fail("bad_value", name, v, f"one of {', '.join(choices)}")
        return v
    if len(v) > max_chars or (not v and not allow_empty):
        raise wire_fail("bad_value", name, v, f"a {'' if allow_empty else 'non-empty '}string of at most "
                    f"{max_chars} characters")
    return v


def check_floats(v: list, name: str, n: int, bound: float) -> None:
    """`v` is a list of exactly n numbers (float or int, not bool), each finite and within +-bound; else
    WireError naming the entry (bad_type, bad_length, non_finite or too_large). Shared by both sides."""
    if len(v) != n:
        raise wire_fail("bad_length", name, f"{len(v)} entries", f"exactly {n} entries")
    for x in v:
        t = type(x)
        if (t is not float and t is not int) or not -bound <= x <= bound:
            _vec_diagnose(v, name, bound)


def dec_vec(v: object, name: str, n: int, bound: float) -> np.ndarray:
    """A list of exactly n finite numbers, each within +-bound, as a float (n,) array."""
    if type(v) is not list:
        raise wire_fail("bad_type", name, v, f"an array of {n} numbers")
    check_floats(v, name, n, bound)
    return np.array(v, dtype=float)


def _vec_diagnose(v: list, name: str, bound: float) -> None:
    for i, x in enumerate(v):
        dec_num(x, f"{name}[{i}]", -bound, bound)


def dec_vec_any(v: object, name: str, bound: float, lo_len: int, hi_len: int) -> np.ndarray:
    """A list of finite numbers of length in [lo_len, hi_len]."""
    if type(v) is not list:
        raise wire_fail("bad_type", name, v, f"an array of {lo_len} to {hi_len} numbers")
    if not lo_len <= len(v) <= hi_len:
        raise wire_fail("bad_length", name, f"{len(v)} entries", f"{lo_len} to {hi_len} entries")
    return dec_vec(v, name, len(v), bound)


def open_map(data: bytes, cap: int, kind: str, keys: frozenset[str], hot: bool) -> tuple[dict, int, int]:
    """(map, seq, stamp_ns) of a message whose key set is exactly `keys`: size, msgpack, header, keys."""
    m = unpack(data, cap, kind, hot)
    check_header(m, kind)
    if m.keys() != keys:
        raise key_error(m, kind, keys, frozenset())
    seq, stamp = seq_stamp(m, kind)
    return m, seq, stamp


def dec_joint_vec(v: object, name: str, n: int | None, bound: float) -> np.ndarray:
    """A joint array: exactly n numbers, or 1 to MAX_JOINTS when n is None (the receiver does not know n)."""
    if n is None:
        return dec_vec_any(v, name, bound, 1, MAX_JOINTS)
    return dec_vec(v, name, n, bound)


def seq_stamp(m: dict, kind: str) -> tuple[int, int]:
    seq = m["seq"]
    stamp = m["stamp_ns"]
    if type(seq) is not int or not 0 <= seq <= SEQ_MAX:
        dec_int(seq, f"{kind}.seq", 0, SEQ_MAX)
    if type(stamp) is not int or not 0 <= stamp <= STAMP_MAX:
        dec_int(stamp, f"{kind}.stamp_ns", 0, STAMP_MAX)
    return seq, stamp


def _as_input_error(exc: WireError) -> InputError:
    """The encoder side of a shared check: the caller handed in what the protocol cannot carry."""
    return InputError(str(exc))


def _python_number(v: object) -> object:
    """A numpy scalar as the Python number it holds (encoders accept them; decoders see only msgpack's)."""
    if isinstance(v, (np.floating, np.integer)) and not isinstance(v, np.bool_):
        return v.item()
    return v


def enc_floats(a: object, name: str, n: int | None, bound: float) -> list[float]:
    """Encoder side of dec_vec: `a` (list or array) as a list of n finite floats within +-bound, or
    InputError naming `name` (the same check as the decoder's)."""
    try:
        values = [float(x) for x in a] if isinstance(a, list) else \
            np.asarray(a, dtype=float).reshape(-1).tolist()
    except (TypeError, ValueError):
        raise input_fail(name, a, "an array of numbers") from None
    try:
        check_floats(values, name, len(values) if n is None else n, bound)
    except WireError as exc:
        raise _as_input_error(exc) from None
    return values


def enc_int(v: object, name: str, lo: int, hi: int) -> int:
    """Encoder side of dec_int (numpy integers accepted)."""
    try:
        return dec_int(_python_number(v), name, lo, hi)
    except WireError as exc:
        raise _as_input_error(exc) from None


def enc_num(v: object, name: str, lo: float, hi: float) -> float:
    """Encoder side of dec_num (numpy numbers accepted)."""
    try:
        return dec_num(_python_number(v), name, lo, hi)
    except WireError as exc:
        raise _as_input_error(exc) from None


def enc_str(v: object, name: str, max_chars: int, choices: tuple[str, ...] | None = None,
            allow_empty: bool = False) -> str:
    """Encoder side of dec_str."""
    try:
        return dec_str(v, name, max_chars, choices, allow_empty)
    except WireError as exc:
        raise _as_input_error(exc) from None


def header(kind: str, seq: int, stamp_ns: int | None) -> dict:
    seq = enc_int(seq, f"{kind}.seq", 0, SEQ_MAX)
    stamp = now_ns() if stamp_ns is None else enc_int(stamp_ns, f"{kind}.stamp_ns", 0, STAMP_MAX)
    return {"proto": PROTOCOL_VERSION, "kind": kind, "seq": seq, "stamp_ns": stamp}


_PACKERS = threading.local()


def packb(obj: object) -> bytes:
    """msgpack.packb(obj) with a Packer reused per thread: msgpack.packb makes a new Packer with a 256 KiB
    buffer on every call (about 260 KiB of transient allocation per tick, measured); one kept per thread
    (threading.local: a Packer is not thread-safe) does the same work without it. Raises what packb
    raises, and leaves the packer empty."""
    packer = getattr(_PACKERS, "packer", None)
    if packer is None:
        packer = _PACKERS.packer = msgpack.Packer(use_bin_type=True, autoreset=True)
    try:
        return packer.pack(obj)
    except BaseException:
        packer.reset()
        raise


def pack(m: dict, cap: int, kind: str) -> bytes:
    data = packb(m)
    if len(data) > cap:
        raise input_fail(kind, f"{len(data)} bytes", f"at most {cap} bytes (shorten the strings)")
    return data


def submap(v: object, name: str, keys: frozenset[str]) -> dict:
    if type(v) is not dict:
        raise wire_fail("bad_type", name, v, f"a map with the fields {', '.join(sorted(keys))}")
    if v.keys() != keys:
        raise key_error(v, name, keys, frozenset())
    return v


def enc_plain(v: Any, name: str, depth: int = 0) -> Any:
    """A result value as plain msgpack data (dict/list/str/int/float/bool/None); finite floats only."""
    if depth > 8:
        raise input_fail(name, "...", "nesting at most 8 levels deep")
    if v is None or type(v) in (bool, int, str):
        return v
    if isinstance(v, (float, np.floating)):
        if not math.isfinite(v):
            raise input_fail(name, v, "a finite number (send nil for an absent or unbounded value)")
        return float(v)
    if isinstance(v, np.integer):
        return int(v)
    if isinstance(v, np.ndarray):
        return enc_plain(v.tolist(), name, depth + 1)
    if isinstance(v, Mapping):
        return {str(k): enc_plain(x, f"{name}.{k}", depth + 1) for k, x in v.items()}
    if isinstance(v, (list, tuple)):
        return [enc_plain(x, f"{name}[{i}]", depth + 1) for i, x in enumerate(v)]
    raise input_fail(name, v, "plain data: map, array, string, number, bool or nil")


def dec_plain(v: Any, name: str) -> None:
    """Floats inside a reply result are finite."""
    t = type(v)
    if t is float:
        if not math.isfinite(v):
            raise wire_fail("non_finite", name, v, "finite numbers")
    elif t is dict:
        for k, x in v.items():
            dec_plain(x, f"{name}.{k}")
    elif t is list:
        for i, x in enumerate(v):
            dec_plain(x, f"{name}[{i}]")
    elif v is not None and t not in (bool, int, str):
        raise wire_fail("bad_type", name, v, "plain data: map, array, string, number, bool or nil")
