// A small msgpack encoder/decoder, written from the msgpack specification (msgpack.org, 2013 spec
// with the str/bin distinction) for the twistrate wire protocol (docs/protocol.md sections 3 and 16).
// Encoding: JS number -> float 64, BigInt -> int (smallest width), string -> str, boolean, null -> nil,
// Array -> array, plain object or Map -> map with str keys. The protocol's ints (proto, seq, stamp_ns,
// lease_ms) are therefore written as BigInt, never as floats (docs/protocol.md section 16).
// Decoding: int -> Number when it is a safe integer, else BigInt; float 32/64 -> Number.

export class MsgpackError extends Error {}

function concat(chunks) {
  let n = 0;
  for (const c of chunks) n += c.length;
  const out = new Uint8Array(n);
  let o = 0;
  for (const c of chunks) { out.set(c, o); o += c.length; }
  return out;
}

function header(small, base8, base16, base32, n) {
  // small: [fixbase, fixmax] or null
  if (small !== null && n <= small[1]) return Uint8Array.of(small[0] | n);
  if (base8 !== null && n < 0x100) return Uint8Array.of(base8, n);
  if (n < 0x10000) return Uint8Array.of(base16, n >> 8, n & 0xff);
  const b = new Uint8Array(5); b[0] = base32; new DataView(b.buffer).setUint32(1, n); return b;
}

function encodeInt(v) {
  if (v >= 0n) {
    if (v < 0x80n) return Uint8Array.of(Number(v));
    if (v < 0x100n) return Uint8Array.of(0xcc, Number(v));
    if (v < 0x10000n) { const b = new Uint8Array(3); b[0] = 0xcd; new DataView(b.buffer).setUint16(1, Number(v)); return b; }
    if (v < 0x100000000n) { const b = new Uint8Array(5); b[0] = 0xce; new DataView(b.buffer).setUint32(1, Number(v)); return b; }
    if (v < 0x10000000000000000n) { const b = new Uint8Array(9); b[0] = 0xcf; new DataView(b.buffer).setBigUint64(1, v); return b; }
    throw new MsgpackError(`integer ${v} beyond 64 bits`);
  }
  if (v >= -32n) return Uint8Array.of(Number(v) & 0xff);
  if (v >= -0x80n) { const b = new Uint8Array(2); b[0] = 0xd0; new DataView(b.buffer).setInt8(1, Number(v)); return b; }
  if (v >= -0x8000n) { const b = new Uint8Array(3); b[0] = 0xd1; new DataView(b.buffer).setInt16(1, Number(v)); return b; }
  if (v >= -0x80000000n) { const b = new Uint8Array(5); b[0] = 0xd2; new DataView(b.buffer).setInt32(1, Number(v)); return b; }
  const b = new Uint8Array(9); b[0] = 0xd3; new DataView(b.buffer).setBigInt64(1, v); return b;
}

function encodeInto(v, out) {
  if (v === null || v === undefined) out.push(Uint8Array.of(0xc0));
  else if (v === true) out.push(Uint8Array.of(0xc3));
  else if (v === false) out.push(Uint8Array.of(0xc2));
  else if (typeof v === "bigint") out.push(encodeInt(v));
  else if (typeof v === "number") {
    const b = new Uint8Array(9); b[0] = 0xcb; new DataView(b.buffer).setFloat64(1, v); out.push(b);
  } else if (typeof v === "string") {
    const s = new TextEncoder().encode(v);
    out.push(header([0xa0, 31], 0xd9, 0xda, 0xdb, s.length), s);
  } else if (Array.isArray(v)) {
    out.push(header([0x90, 15], null, 0xdc, 0xdd, v.length));
    for (const x of v) encodeInto(x, out);
  } else if (typeof v === "object") {
    const entries = v instanceof Map ? [...v.entries()] : Object.entries(v);
    out.push(header([0x80, 15], null, 0xde, 0xdf, entries.length));
    for (const [k, x] of entries) { encodeInto(String(k), out); encodeInto(x, out); }
  } else throw new MsgpackError(`cannot encode ${typeof v}`);
}

export function encode(v) {
  const out = [];
  encodeInto(v, out);
  return concat(out);
}

function intOut(big) {
  return big >= BigInt(Number.MIN_SAFE_INTEGER) && big <= BigInt(Number.MAX_SAFE_INTEGER) ? Number(big) : big;
}

export function decode(bytes) {
  const dv = new DataView(bytes.buffer, bytes.byteOffset, bytes.byteLength);
  let i = 0;
  const need = (n) => { if (i + n > bytes.length) throw new MsgpackError("truncated"); };
  const str = (n) => { need(n); const s = new TextDecoder("utf-8", { fatal: true }).decode(bytes.subarray(i, i + n)); i += n; return s; };
  const arr = (n) => { const a = []; for (let k = 0; k < n; k++) a.push(one()); return a; };
  const map = (n) => { const m = {}; for (let k = 0; k < n; k++) { const key = one(); if (typeof key !== "string") throw new MsgpackError("map key not str"); m[key] = one(); } return m; };
  function one() {
    need(1);
    const t = bytes[i++];
    if (t < 0x80) return t;
    if (t >= 0xe0) return t - 0x100;
    if ((t & 0xf0) === 0x80) return map(t & 0x0f);
    if ((t & 0xf0) === 0x90) return arr(t & 0x0f);
    if ((t & 0xe0) === 0xa0) return str(t & 0x1f);
    let v;
    switch (t) {
      case 0xc0: return null;
      case 0xc2: return false;
      case 0xc3: return true;
      case 0xca: need(4); v = dv.getFloat32(i); i += 4; return v;
      case 0xcb: need(8); v = dv.getFloat64(i); i += 8; return v;
      case 0xcc: need(1); return bytes[i++];
      case 0xcd: need(2); v = dv.getUint16(i); i += 2; return v;
      case 0xce: need(4); v = dv.getUint32(i); i += 4; return v;
      case 0xcf: need(8); v = dv.getBigUint64(i); i += 8; return intOut(v);
      case 0xd0: need(1); v = dv.getInt8(i); i += 1; return v;
      case 0xd1: need(2); v = dv.getInt16(i); i += 2; return v;
      case 0xd2: need(4); v = dv.getInt32(i); i += 4; return v;
      case 0xd3: need(8); v = dv.getBigInt64(i); i += 8; return intOut(v);
      case 0xd9: need(1); return str(bytes[i++]);
      case 0xda: need(2); v = dv.getUint16(i); i += 2; return str(v);
      case 0xdb: need(4); v = dv.getUint32(i); i += 4; return str(v);
      case 0xdc: need(2); v = dv.getUint16(i); i += 2; return arr(v);
      case 0xdd: need(4); v = dv.getUint32(i); i += 4; return arr(v);
      case 0xde: need(2); v = dv.getUint16(i); i += 2; return map(v);
      case 0xdf: need(4); v = dv.getUint32(i); i += 4; return map(v);
      default: throw new MsgpackError(`type byte 0x${t.toString(16)} is not used by the protocol (bin, ext)`);
    }
  }
  const v = one();
  if (i !== bytes.length) throw new MsgpackError("trailing bytes");
  return v;
}
