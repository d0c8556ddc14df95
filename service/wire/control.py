"""Encode/decode pairs of the control plane: requests and replies (docs/protocol.md section 8).

A control request or reply is one msgpack map (after the DEALER/ROUTER envelope). The request's argument
fields per op are REQUEST_ARGS, the result fields of an ok reply REPLY_RESULTS (wire.constants).
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from typing import Any

from twistrate.service.wire.checks import (
    HEADER_KEYS,
    check_header,
    dec_int,
    dec_plain,
    dec_str,
    enc_int,
    enc_plain,
    enc_str,
    header,
    input_fail,
    key_error,
    now_ns,
    pack,
    seq_stamp,
    submap,
    unpack,
    wire_fail,
)
from twistrate.service.wire.constants import (
    E_BAD_REQUEST,
    E_UNKNOWN_OP,
    ERROR_CODES,
    INSTANCE_MAX,
    INSTANCE_MIN,
    KIND_REPLY,
    KIND_REQUEST,
    LEASE_MS_MAX,
    LEASE_MS_MIN,
    MAX_CONTROL_BYTES,
    MAX_NAME_CHARS,
    MAX_PARAMS,
    MAX_TEXT_CHARS,
    OPS,
    PROTOCOL_VERSION,
    REPLY_RESULTS,
    REQUEST_ARGS,
    SEQ_MAX,
    STAMP_MAX,
)
from twistrate.service.wire.health import _dec_keepout, _dec_limiting, _enc_keepout, _enc_limiting
from twistrate.service.wire.messages import KeepoutNearest, Limiting, ReplyMessage, RequestMessage
from twistrate.solver.errors import InputError, WireError

_REQUEST_HEADER = frozenset((*HEADER_KEYS, "op"))


def _param_value(v: object, name: str) -> bool | int | float | str:
    t = type(v)
    if t is bool:
        return v  # type: ignore[return-value]
    if t is int or t is float:
        if not math.isfinite(v):  # type: ignore[arg-type]
            raise wire_fail("non_finite", name, v, "a finite number")
        return v  # type: ignore[return-value]
    if t is str:
        return dec_str(v, name, MAX_NAME_CHARS)
    raise wire_fail("bad_type", name, v, "a bool, number or string")


def _check_args(args: Mapping[str, Any]) -> dict[str, Any]:
    """Type and bound checks of a request's argument fields; raises WireError naming the field."""
    out: dict[str, Any] = {}
    for key, v in args.items():
        name = f"request.{key}"
        if key in ("client", "lease"):
            out[key] = dec_str(v, name, MAX_NAME_CHARS)
        elif key == "lease_ms":
            out[key] = dec_int(v, name, LEASE_MS_MIN, LEASE_MS_MAX)
        elif key == "params":
            if type(v) is not dict:
                raise wire_fail("bad_type", name, v, f"a map of 1 to {MAX_PARAMS} name -> value entries")
            if not 1 <= len(v) <= MAX_PARAMS:
                raise wire_fail("bad_length", name, f"{len(v)} entries", f"1 to {MAX_PARAMS} entries")
            out[key] = {dec_str(k, f"{name} key", MAX_NAME_CHARS): _param_value(p, f"{name}.{k}")
                        for k, p in v.items()}
    return out


def _args_error(op: str, given: frozenset[str]) -> tuple[str, str, str]:
    """(reason, field, accepted) for a request whose argument fields do not match its op."""
    required, optional = REQUEST_ARGS[op]
    accepted = f"for op {op!r}: {', '.join(sorted(required)) or 'no fields'}" + (
        f" (optional: {', '.join(sorted(optional))})" if optional else "")
    missing = sorted(required - given)
    if missing:
        return "missing_field", f"request.{missing[0]}", accepted
    return "extra_field", f"request.{sorted(map(str, given - required - optional))[0]}", accepted


def encode_request(*, seq: int, op: str, stamp_ns: int | None = None, **args: Any) -> bytes:
    """Encode a control request: op plus its argument fields (REQUEST_ARGS), e.g.
    encode_request(seq=1, op="claim", client="pad", lease_ms=1000)."""
    m = header(KIND_REQUEST, seq, stamp_ns)
    m["op"] = enc_str(op, "request.op", MAX_NAME_CHARS, OPS)
    required, optional = REQUEST_ARGS[op]
    given = frozenset(args)
    if not required <= given <= required | optional:
        _, name, accepted = _args_error(op, given)
        raise input_fail(name, sorted(given), accepted)
    try:
        m.update(_check_args(args))
    except WireError as exc:
        raise InputError(str(exc)) from None
    return pack(m, MAX_CONTROL_BYTES, KIND_REQUEST)


def decode_request(data: bytes) -> RequestMessage:
    """Decode and check a control request. Raises WireError (an op not in OPS: reason unknown_op)."""
    m = unpack(data, MAX_CONTROL_BYTES, KIND_REQUEST, False)
    check_header(m, KIND_REQUEST)
    for key in ("seq", "stamp_ns", "op"):
        if key not in m:
            raise wire_fail("missing_field", f"request.{key}", None,
                        f"required fields {', '.join(sorted(_REQUEST_HEADER))}")
    seq, stamp = seq_stamp(m, KIND_REQUEST)
    op = m["op"]
    if op not in OPS:
        if type(op) is not str:
            raise wire_fail("bad_type", "request.op", op, f"one of {', '.join(OPS)}")
        raise wire_fail("unknown_op", "request.op", op, f"one of {', '.join(OPS)}")
    required, optional = REQUEST_ARGS[op]
    given = frozenset(m.keys() - _REQUEST_HEADER)
    if not required <= given <= required | optional:
        reason, name, accepted = _args_error(op, given)
        raise wire_fail(reason, name, m.get(name.split(".", 1)[1]), accepted)
    return RequestMessage(seq, stamp, op, _check_args({k: m[k] for k in given}))


def error_code(exc: WireError) -> str:
    """The reply error code for a request that failed to decode: unknown_op or bad_request."""
    return E_UNKNOWN_OP if exc.reason == "unknown_op" else E_BAD_REQUEST


def peek_request(data: bytes) -> tuple[int, str]:
    """Best-effort (seq, op) of a request that failed to decode, for the error reply: (-1, "") when
    unreadable; op is "" unless it is one of OPS."""
    try:
        m = unpack(data, MAX_CONTROL_BYTES, KIND_REQUEST, False)
    except Exception:
        return -1, ""
    if type(m) is not dict:
        return -1, ""
    seq = m.get("seq")
    op = m.get("op")
    return (seq if type(seq) is int and 0 <= seq <= SEQ_MAX else -1), (op if op in OPS else "")


#: the status result's fields the codec checks itself: the instance id and the start time (section 6)
_STATUS_IDENTITY = (("instance", INSTANCE_MIN, INSTANCE_MAX), ("started_ns", 0, STAMP_MAX))


def _status_keepout(result: Mapping[str, Any], encode: bool) -> dict[str, Any]:
    """The status result with its `keepout` (nil or a map, as in health) and `limiting` (a map) checked:
    encode takes each as its tuple (KeepoutNearest, Limiting) or its map; decode leaves maps."""
    out = dict(result)
    n = result["n"] if type(result.get("n")) is int and result["n"] > 0 else 1
    ko, lim = result["keepout"], result["limiting"]
    where_k, where_l = "reply(status).result.keepout", "reply(status).result.limiting"
    if encode:
        if isinstance(ko, Mapping):
            ko = tuple(ko.get(f) for f in KeepoutNearest._fields)
        if isinstance(lim, Mapping):
            lim = tuple(lim.get(f) for f in Limiting._fields)
        out["keepout"] = None if ko is None else _enc_keepout(ko, where_k)
        out["limiting"] = _enc_limiting(lim, n, where_l)
    else:
        k = _dec_keepout(ko, where_k)
        out["keepout"] = None if k is None else k._asdict()
        out["limiting"] = _dec_limiting(lim, n, where_l)._asdict()
    return out


def _status_identity(result: dict[str, Any], check: Any) -> None:
    """Check the status result's `instance` and `started_ns` with check (enc_int or dec_int)."""
    for key, lo, hi in _STATUS_IDENTITY:
        result[key] = check(result[key], f"reply(status).result.{key}", lo, hi)


_REPLY_OK_KEYS = frozenset((*HEADER_KEYS, "op", "ok", "result"))
_REPLY_ERR_KEYS = frozenset((*HEADER_KEYS, "op", "ok", "error"))
_ERROR_KEYS = frozenset(("code", "message"))



def encode_reply(*, seq: int, op: str, result: Mapping[str, Any] | None = None,
                 error: tuple[str, str] | None = None, stamp_ns: int | None = None) -> bytes:
    """Encode a control reply: ok with `result` (exact keys REPLY_RESULTS[op]) or refused with
    error=(code, message), code one of ERROR_CODES. seq echoes the request's seq (-1 if unreadable);
    op echoes the request's op ("" if unreadable or unknown, which only an error reply may carry)."""
    if (result is None) == (error is None):
        raise input_fail("reply", (result, error), "exactly one of result (ok) or error (refused)")
    seq = enc_int(seq, "reply.seq", -1, SEQ_MAX)
    stamp = now_ns() if stamp_ns is None else enc_int(stamp_ns, "reply.stamp_ns", 0, STAMP_MAX)
    m: dict[str, Any] = {"proto": PROTOCOL_VERSION, "kind": KIND_REPLY, "seq": seq, "stamp_ns": stamp}
    if error is not None:
        code, message = error
        m["op"] = enc_str(op, "reply.op", MAX_NAME_CHARS, (*OPS, ""))
        m["ok"] = False
        m["error"] = {"code": enc_str(code, "reply.error.code", MAX_NAME_CHARS, ERROR_CODES),
                      "message": str(message)[:MAX_TEXT_CHARS]}
    else:
        m["op"] = enc_str(op, "reply.op", MAX_NAME_CHARS, OPS)
        m["ok"] = True
        assert result is not None
        if frozenset(result) != REPLY_RESULTS[op]:
            raise input_fail(f"reply({op}).result", sorted(result),
                             f"exactly the fields {sorted(REPLY_RESULTS[op])}")
        if op == "status":
            result = _status_keepout(result, encode=True)
        m["result"] = enc_plain(result, f"reply({op}).result")
        if op == "status":
            _status_identity(m["result"], enc_int)
    return pack(m, MAX_CONTROL_BYTES, KIND_REPLY)


def decode_reply(data: bytes) -> ReplyMessage:
    """Decode and check a control reply (result key set per op; values are plain msgpack data)."""
    m = unpack(data, MAX_CONTROL_BYTES, KIND_REPLY, False)
    check_header(m, KIND_REPLY)
    ok = m.get("ok")
    if type(ok) is not bool:
        if "ok" not in m:
            raise wire_fail("missing_field", "reply.ok", None, "true or false")
        raise wire_fail("bad_type", "reply.ok", ok, "true or false")
    keys = _REPLY_OK_KEYS if ok else _REPLY_ERR_KEYS
    if m.keys() != keys:
        raise key_error(m, "reply", keys, frozenset())
    seq = dec_int(m["seq"], "reply.seq", -1, SEQ_MAX)
    stamp = dec_int(m["stamp_ns"], "reply.stamp_ns", 0, STAMP_MAX)
    if not ok:
        op = dec_str(m["op"], "reply.op", MAX_NAME_CHARS, (*OPS, ""))
        err = submap(m["error"], "reply.error", _ERROR_KEYS)
        code = dec_str(err["code"], "reply.error.code", MAX_NAME_CHARS, ERROR_CODES)
        message = dec_str(err["message"], "reply.error.message", MAX_TEXT_CHARS, allow_empty=True)
        return ReplyMessage(seq, stamp, op, False, {}, code, message)
    op = dec_str(m["op"], "reply.op", MAX_NAME_CHARS, OPS)
    result = submap(m["result"], f"reply({op}).result", REPLY_RESULTS[op])
    dec_plain(result, f"reply({op}).result")
    if op == "status":
        _status_identity(result, dec_int)
        result = _status_keepout(result, encode=False)
    return ReplyMessage(seq, stamp, op, True, result, None, None)

