"""The soak's arithmetic (`twistrate bench soak`): resident-memory growth per hour and the counter
identities checked at the end. Pure functions on plain numbers; no processes, no clock.

Each identity names the section of docs/protocol.md (or docs/operation.md) that defines it:

* intake: every message taken from the intake socket is counted exactly once (protocol section 11,
  "What the intake takes"; operation.md "Counters"): twists sent + joint states sent = accepted_twist +
  accepted_joints + rejected_total + superseded. It holds exactly when every message sent was taken:
  the soak's senders start only once they saw the service's subscription, the high-water marks are
  raised far beyond any stall, and the counters are read after the senders stopped and the intake
  went quiet;
* refused, by reason (protocol section 11's reason table): rejected_not_leased = twists sent with a
  released token, rejected_bad_version = maps with `proto` 2, rejected_not_msgpack = frames that are
  not msgpack; every other reason 0;
* superseded, per topic (protocol section 11: a twist or joint state taken with a newer one and
  discarded unread): twists sent under a lease - accepted_twist >= 0 and joint states sent -
  accepted_joints >= 0, and the two sum to superseded;
* commands (protocol 7.3, a command every tick once a joint state is known; section 6, `seq` +1 per
  message): seq - tick is the same for every command the watcher received, the watcher received
  last.seq - first.seq + 1 of them (nothing dropped), and the final `commands` - `ticks` counters
  equal that offset (within one tick: the counters are read while the tick runs);
* events (protocol 10): lease_claimed, lease_released and enabled events, one per claim, release and
  enable the sources made, and no gap in the event `seq`;
* health (protocol 7.4): `overruns` never decreases from one health message to the next, and no
  `rejected` count in a health message exceeds the final counter.
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np

#: Resident memory samples before this point are the warm-up (imports, allocator pools, the first
#: histogram bins), s: the growth slope is fitted after it.
WARMUP_MIN_S = 5.0
WARMUP_MAX_S = 120.0
WARMUP_FRACTION = 0.25
#: The refusal reasons the soak provokes on purpose (the rest must stay 0).
PROVOKED = ("not_leased", "bad_version", "not_msgpack")


def warmup_s(total_s: float) -> float:
    """The warm-up excluded from the memory fit: a quarter of the run, within 5 ... 120 s."""
    return min(WARMUP_MAX_S, max(WARMUP_MIN_S, WARMUP_FRACTION * total_s))


def memory_growth(samples: list[tuple[float, float]], warm_s: float) -> dict[str, Any]:
    """samples : [(t s since the start, resident memory MB)]. Least-squares slope of the samples after
    warm_s, in MB per hour, with the first and last fitted values and the count used (nan slope with
    fewer than 3 samples after the warm-up)."""
    t = np.array([s[0] for s in samples if s[0] >= warm_s], dtype=float)
    mb = np.array([s[1] for s in samples if s[0] >= warm_s], dtype=float)
    out: dict[str, Any] = {"samples": len(samples), "fitted_samples": int(t.size), "warmup_s": warm_s,
                           "rss_first_mb": samples[0][1] if samples else math.nan,
                           "rss_last_mb": samples[-1][1] if samples else math.nan,
                           "rss_max_mb": max((s[1] for s in samples), default=math.nan)}
    if t.size < 3 or float(np.ptp(t)) <= 0.0:
        out["growth_mb_per_h"] = math.nan
        return out
    slope, _ = np.polyfit(t / 3600.0, mb, 1)
    out["growth_mb_per_h"] = float(slope)
    out["fitted_span_s"] = float(np.ptp(t))
    return out


def _check(name: str, ok: bool, detail: str) -> dict[str, Any]:
    return {"name": name, "ok": bool(ok), "detail": detail}


def identities(sent: dict[str, int], driver: dict[str, int], counters: dict[str, int],
               watch: dict[str, Any]) -> list[dict[str, Any]]:
    """Every identity of the module docstring, each {name, ok, detail}.

    sent : what the sources sent (twists_leased, twists_released_token, bad_version, not_msgpack,
    claims, releases, enables). driver : joint states sent (`joints_sent`). counters : the service's
    final `counters` result. watch : what the watcher saw (commands, first/last seq, offsets, event
    counts, health checks)."""
    c = counters
    twists = sent["twists_leased"] + sent["twists_released_token"] + sent["bad_version"] + sent["not_msgpack"]
    taken = c["accepted_twist"] + c["accepted_joints"] + c["rejected_total"] + c["superseded"]
    out = [_check("intake: sent = accepted + refused + superseded (protocol 11)",
                  twists + driver["joints_sent"] == taken,
                  f"{twists} twists + {driver['joints_sent']} joint states sent; service: "
                  f"{c['accepted_twist']} + {c['accepted_joints']} accepted + {c['rejected_total']} refused "
                  f"+ {c['superseded']} superseded = {taken}")]
    expected = {"not_leased": sent["twists_released_token"], "bad_version": sent["bad_version"],
                "not_msgpack": sent["not_msgpack"]}
    got = {k[len("rejected_"):]: v for k, v in c.items()
           if k.startswith("rejected_") and k != "rejected_total"}
    others = {k: v for k, v in got.items() if k not in PROVOKED and v}
    out.append(_check("refused by reason (protocol 11)",
                      all(got.get(k, 0) == v for k, v in expected.items()) and not others,
                      ", ".join(f"{k} {got.get(k, 0)} of {v} provoked" for k, v in expected.items())
                      + (f"; unexpected: {others}" if others else "; every other reason 0")))
    sup_twist = sent["twists_leased"] - c["accepted_twist"]
    sup_joints = driver["joints_sent"] - c["accepted_joints"]
    out.append(_check("superseded per topic: sent under a lease = accepted + superseded (protocol 11)",
                      sup_twist >= 0 and sup_joints >= 0 and sup_twist + sup_joints == c["superseded"],
                      f"twists {sent['twists_leased']} = {c['accepted_twist']} accepted + {sup_twist} "
                      "superseded; "
                      f"joint states {driver['joints_sent']} = {c['accepted_joints']} + {sup_joints}; "
                      f"superseded counter {c['superseded']}"))
    n_cmd = watch["commands"]
    span = watch["last_seq"] - watch["first_seq"] + 1 if n_cmd else 0
    offset = watch["seq_minus_tick"]
    final = c["commands"] - c["ticks"]
    out.append(_check("a command every tick, none dropped (protocol 6, 7.3)",
                      n_cmd > 0 and watch["offsets_seen"] == 1 and n_cmd == span and abs(final - offset) <= 1,
                      f"{n_cmd} received of {span} published in the window (seq {watch['first_seq']} .. "
                      f"{watch['last_seq']}); seq - tick took {watch['offsets_seen']} value(s) ({offset}); "
                      f"counters commands - ticks = {final}"))
    ev = watch["events"]
    want = {"lease_claimed": sent["claims"], "lease_released": sent["releases"], "enabled": sent["enables"]}
    out.append(_check("events: one per claim, release, enable; no gap (protocol 10)",
                      all(ev.get(k, 0) == v for k, v in want.items()) and watch["event_gaps"] == 0,
                      ", ".join(f"{k} {ev.get(k, 0)} of {v}" for k, v in want.items())
                      + f"; {watch['event_gaps']} events missing by seq"))
    hr = watch["health_rejected_max"]
    over = {k: v for k, v in hr.items() if v > c.get(f"rejected_{k}", 0)}
    out.append(_check("health: overruns never decrease, rejected within the counters (protocol 7.4)",
                      watch["health"] > 0 and watch["health_overruns_decreased"] == 0 and not over,
                      f"{watch['health']} health messages, overruns decreased "
                      f"{watch['health_overruns_decreased']} times; rejected above the counters: "
                      f"{over or 'none'}"))
    return out
