// A twistrate client in JavaScript, written from docs/protocol.md alone (sections 1-4, 7.1, 7.3,
// 8, 9, 14, 16), with its own ZMTP peer (zmtp.mjs) and msgpack codec (msgpack.mjs): no ZeroMQ or
// msgpack library. Usage:
//   node client.mjs encode-example          prints the hex of section 14's twist, encoded here
//   node client.mjs run ENDPOINTS.json      claims, enables, streams twists for 1 s, reads the
//                                           commands answering them, sends one twist with a float
//                                           stamp_ns (refused: bad_type), disables, releases, and
//                                           prints one JSON summary line.
import fs from "node:fs";
import { encode, decode } from "./msgpack.mjs";
import { ZmtpSocket } from "./zmtp.mjs";

const enc = new TextEncoder();
const dec = new TextDecoder();
const hex = (b) => Buffer.from(b).toString("hex");
const nowNs = () => BigInt(Date.now()) * 1000000n;
const jsonSafe = (v) => JSON.stringify(v, (k, x) => (typeof x === "bigint" ? x.toString() : x));

function exampleTwist() { // section 14, field order as printed there
  return { proto: 1n, kind: "twist", seq: 3n, stamp_ns: 1700000000000000000n,
           linear: [0.1, 0.0, 0.2], angular: [0.0, 0.0, 0.5], frame: "tool",
           point: [0.0, 0.0, 0.1], lease: "ab12cd34ef56ab78" };
}

async function run(endpointsFile) {
  const ep = JSON.parse(fs.readFileSync(endpointsFile, "utf8"));
  const control = await new ZmtpSocket("DEALER").connect(ep.control);
  const output = await new ZmtpSocket("SUB").connect(ep.output);
  const intake = await new ZmtpSocket("PUB").connect(ep.intake);
  output.subscribe("command");
  const seqs = { request: 0n, twist: 0n };
  const header = (kind) => ({ proto: 1n, kind, seq: ++seqs[kind], stamp_ns: nowNs() });

  async function request(op, fields = {}) {
    const h = header("request");
    control.send([new Uint8Array(0), encode({ ...h, op, ...fields })]);
    for (;;) { // DEALER: match the reply to the request by seq, drop late ones (section 16)
      const frames = await control.recv(3000);
      if (frames.length !== 2 || frames[0].length !== 0) throw new Error(`reply frames: ${frames.length}`);
      const reply = decode(frames[1]);
      if (BigInt(reply.seq) !== h.seq) continue;
      if (reply.kind !== "reply" || reply.op !== op) throw new Error(`reply to ${op}: ${jsonSafe(reply)}`);
      if (!reply.ok) throw new Error(`${op}: ${reply.error.code}: ${reply.error.message}`);
      return reply.result;
    }
  }

  // The intake is ready for us once the service's subscriptions arrive on our PUB (section 16).
  const subscriptions = new Set();
  while (!subscriptions.has("twist")) {
    const [body] = await intake.recv(3000);
    if (body[0] === 1) subscriptions.add(dec.decode(body.subarray(1)));
  }
  const status = await request("status");
  const arm = await request("arm");
  const before = (await request("counters")).counters;
  const lease = (await request("claim", { client: "js-sketch", lease_ms: 10000n })).lease;
  const enabled = await request("enable", { lease });
  const sent = [];
  const commands = [];
  const t0 = Date.now();
  while (Date.now() - t0 < 1000) { // 100 twists a second (section 7.1: 50 to 250 is typical)
    const h = header("twist");
    const twist = { ...h, linear: [0.02, 0.0, 0.0], angular: [0.0, 0.0, 0.0], frame: "base", lease };
    intake.send([enc.encode("twist"), encode(twist)]);
    sent.push(h.seq);
    await new Promise((r) => setTimeout(r, 10));
    for (const [topic, data] of output.drain()) {
      if (dec.decode(topic) !== "command") throw new Error("unsubscribed topic");
      commands.push({ bytes: hex(data), command: decode(data) });
    }
  }
  // A float stamp_ns is refused as bad_type (section 16, "64-bit integers").
  const bad = { ...header("twist"), linear: [0.0, 0.0, 0.0], angular: [0.0, 0.0, 0.0], frame: "base", lease };
  bad.stamp_ns = Number(bad.stamp_ns);
  intake.send([enc.encode("twist"), encode(bad)]);
  await new Promise((r) => setTimeout(r, 200));
  const after = (await request("counters")).counters;
  const disabled = await request("disable", { lease });
  await request("release", { lease });
  const answered = commands.filter((c) => sent.includes(BigInt(c.command.answers)));
  console.log(jsonSafe({
    peer_types: [control.peerType, output.peerType, intake.peerType],
    status, arm_n: arm.n, enabled: enabled.mode, disabled: disabled.mode,
    sent: sent.length, first_seq: sent[0], last_seq: sent[sent.length - 1],
    commands: commands.length, answered: answered.length,
    sample: answered.slice(-5),
    bad_type_before: before.rejected_bad_type, bad_type_after: after.rejected_bad_type,
    accepted_twist_before: before.accepted_twist, accepted_twist_after: after.accepted_twist,
  }));
  for (const s of [control, output, intake]) s.close();
}

const [cmd, arg] = process.argv.slice(2);
if (cmd === "encode-example") console.log(hex(encode(exampleTwist())));
else if (cmd === "run") await run(arg);
else { console.error("usage: node client.mjs encode-example | run ENDPOINTS.json"); process.exit(2); }
