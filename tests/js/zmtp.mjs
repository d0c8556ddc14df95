// A minimal ZeroMQ peer over TCP, written from the ZMTP 3.0 specification (ZeroMQ RFC 23/ZMTP,
// "ZeroMQ Message Transport Protocol", 2013) with the NULL security mechanism: the 64-byte
// greeting, the READY command carrying the Socket-Type property, then frames (flags: bit 0 MORE,
// bit 1 LONG size, bit 2 COMMAND). Enough for a PUB, a SUB (subscriptions as messages whose first
// byte is 1, the ZMTP 3.0 form) and a DEALER, one connection each. No reconnect, no CURVE.

import net from "node:net";

const FLAG_MORE = 0x01, FLAG_LONG = 0x02, FLAG_COMMAND = 0x04;

function greeting() {
  const g = new Uint8Array(64);
  g[0] = 0xff; g[9] = 0x7f;            // signature: %xFF, 8 bytes padding, %x7F
  g[10] = 3; g[11] = 0;                // version 3.0
  g.set(new TextEncoder().encode("NULL"), 12); // mechanism, 20 bytes, zero padded
  g[32] = 0;                           // as-server: no (a client)
  return g;                            // 31 bytes filler, zero
}

function frame(body, flags) {
  if (body.length > 255) {
    const f = new Uint8Array(9 + body.length);
    f[0] = flags | FLAG_LONG;
    new DataView(f.buffer).setBigUint64(1, BigInt(body.length));
    f.set(body, 9);
    return f;
  }
  const f = new Uint8Array(2 + body.length);
  f[0] = flags; f[1] = body.length; f.set(body, 2);
  return f;
}

function readyCommand(socketType) {
  const enc = new TextEncoder();
  const name = enc.encode("Socket-Type"), value = enc.encode(socketType);
  const body = new Uint8Array(1 + 5 + 1 + name.length + 4 + value.length);
  let o = 0;
  body[o++] = 5; body.set(enc.encode("READY"), o); o += 5;
  body[o++] = name.length; body.set(name, o); o += name.length;
  new DataView(body.buffer).setUint32(o, value.length); o += 4;
  body.set(value, o);
  return frame(body, FLAG_COMMAND);
}

export class ZmtpSocket {
  constructor(socketType) {
    this.socketType = socketType;
    this.buffer = new Uint8Array(0);
    this.parts = [];
    this.messages = [];
    this.waiters = [];
    this.greeted = false;
    this.ready = false;
    this.peerType = null;
  }

  connect(endpoint, timeoutMs = 3000) {
    const m = /^tcp:\/\/([^:]+):(\d+)$/.exec(endpoint);
    if (!m) throw new Error(`only tcp://HOST:PORT endpoints: ${endpoint}`);
    return new Promise((resolve, reject) => {
      const timer = setTimeout(() => reject(new Error(`no ZMTP handshake with ${endpoint} in ${timeoutMs} ms`)), timeoutMs);
      this.onReady = () => { clearTimeout(timer); resolve(this); };
      this.sock = net.connect(Number(m[2]), m[1], () => {
        this.sock.setNoDelay(true);
        this.sock.write(greeting());
      });
      this.sock.on("data", (d) => this.feed(new Uint8Array(d.buffer, d.byteOffset, d.length)));
      this.sock.on("error", (e) => { clearTimeout(timer); reject(e); });
    });
  }

  feed(data) {
    const b = new Uint8Array(this.buffer.length + data.length);
    b.set(this.buffer); b.set(data, this.buffer.length);
    this.buffer = b;
    if (!this.greeted) {
      if (this.buffer.length < 64) return;
      if (this.buffer[0] !== 0xff || this.buffer[9] !== 0x7f || this.buffer[10] < 3) throw new Error("not a ZMTP 3 peer");
      this.buffer = this.buffer.subarray(64);
      this.greeted = true;
      this.sock.write(readyCommand(this.socketType));
    }
    for (;;) {
      if (this.buffer.length < 2) return;
      const flags = this.buffer[0];
      let size, head;
      if (flags & FLAG_LONG) {
        if (this.buffer.length < 9) return;
        size = Number(new DataView(this.buffer.buffer, this.buffer.byteOffset + 1, 8).getBigUint64(0));
        head = 9;
      } else { size = this.buffer[1]; head = 2; }
      if (this.buffer.length < head + size) return;
      const body = this.buffer.slice(head, head + size);
      this.buffer = this.buffer.subarray(head + size);
      if (flags & FLAG_COMMAND) this.command(body);
      else {
        this.parts.push(body);
        if (!(flags & FLAG_MORE)) { this.deliver(this.parts); this.parts = []; }
      }
    }
  }

  command(body) {
    const name = new TextDecoder().decode(body.subarray(1, 1 + body[0]));
    if (name === "READY") {
      let o = 1 + body[0];
      while (o < body.length) {
        const n = body[o++]; const key = new TextDecoder().decode(body.subarray(o, o + n)); o += n;
        const len = new DataView(body.buffer, body.byteOffset + o, 4).getUint32(0); o += 4;
        if (key === "Socket-Type") this.peerType = new TextDecoder().decode(body.subarray(o, o + len));
        o += len;
      }
      this.ready = true;
      this.onReady();
    } else if (name === "ERROR") throw new Error("ZMTP ERROR from peer");
  }

  deliver(msg) {
    const w = this.waiters.shift();
    if (w) w(msg); else this.messages.push(msg);
  }

  send(frames) {
    frames.forEach((f, k) => this.sock.write(frame(f, k < frames.length - 1 ? FLAG_MORE : 0)));
  }

  subscribe(topic) { // SUB: a subscription is a message of 1 followed by the prefix (ZMTP 3.0)
    const t = new TextEncoder().encode(topic);
    const body = new Uint8Array(1 + t.length); body[0] = 1; body.set(t, 1);
    this.send([body]);
  }

  recv(timeoutMs) {
    if (this.messages.length) return Promise.resolve(this.messages.shift());
    return new Promise((resolve, reject) => {
      const timer = setTimeout(() => {
        this.waiters = this.waiters.filter((w) => w !== done);
        reject(new Error(`no message in ${timeoutMs} ms`));
      }, timeoutMs);
      const done = (m) => { clearTimeout(timer); resolve(m); };
      this.waiters.push(done);
    });
  }

  drain() { const m = this.messages; this.messages = []; return m; }

  close() { this.sock.destroy(); }
}
