"""The keep-out part of `twistrate bench solver`: the whole tick with the keep-out pass vs the free tick.

reach7 (8 capsules) along the recorded slow trajectory of `twistrate bench keepout` (states, previous
rates and twists recorded first; the timed loops only replay them), in its two invented cells of 3
zones each (`twistrate.service.bench.keepout.CELLS`):

* `none_near`: no pair within the influence distance on any tick (the early-out case); the figure
  is `resolve(..., keepout=pass)` against `resolve(...)` on the same states: `ratio_to_free`
  (target <= KEEPOUT_NONE_NEAR_TARGET);
* `two_active`: a wall and a bench top near the tool, two damper rows at the median tick; the rows
  join the scaling problem, so this is a saturated tick: its median, p99 and ratio to the free tick
  (target: that of the saturated tick, `saturation_report.TARGETS["saturated_to_free"]`).

Blocks of BLOCK states are replayed by each variant in turn (rotating order) so that load changes hit
both alike; each variant has its own KeepOut, replayed in recorded order (the pass's early-out keeps
state between ticks). Wall clock on a shared machine: the lead measures published figures.
"""

from __future__ import annotations

import time
from typing import Any

import numpy as np

from twistrate.service.bench.keepout import CELLS, OPTIONS, PERIOD_S, _track
from twistrate.service.bench.saturation_report import TARGETS as SATURATED_TARGETS
from twistrate.solver.keepout import KeepOut
from twistrate.solver.load import load_arm
from twistrate.solver.resolve import resolve, resolve_counted
from twistrate.solver.zones import parse_keepout

#: The issue's target for the tick with 8 capsules and 3 zones, none near: at most this times the free tick.
KEEPOUT_NONE_NEAR_TARGET = 1.5
#: States per block of the interleaved replay.
BLOCK = 250
#: Most states recorded for these figures (the keep-out part is a side figure of bench solver).
MAX_TICKS = 4000


def keepout_figures(ticks: int) -> dict[str, Any]:
    """Figures of both cells (module docstring); ticks: states recorded (at most MAX_TICKS)."""
    arm = load_arm("reach7")
    Q, QD, TW = _track(arm, min(ticks, MAX_TICKS))
    clock = time.perf_counter_ns
    out: dict[str, Any] = {"arm": arm.name, "capsules": len(arm.geometry.capsules), "ticks": len(Q),
                           "target_none_near_ratio": KEEPOUT_NONE_NEAR_TARGET}
    for name, section in CELLS.items():
        passes = {"free": None, "keepout": KeepOut(arm, parse_keepout(section))}
        times: dict[str, list[int]] = {"free": [], "keepout": []}
        scales, rows = [], []
        counter = KeepOut(arm, parse_keepout(section))  # a third pass: one resolve and one rows() per state
        for start in range(0, len(Q), BLOCK):
            order = ["free", "keepout"] if (start // BLOCK) % 2 == 0 else ["keepout", "free"]
            for variant in order:
                ko = passes[variant]
                spent = times[variant]
                for i in range(start, min(start + BLOCK, len(Q))):
                    q, qd, tw = Q[i], QD[i], TW[i]
                    t0 = clock()
                    resolve(arm, q, qd, tw, PERIOD_S, OPTIONS, ko)
                    spent.append(clock() - t0)
        for q, qd, tw in zip(Q, QD, TW, strict=True):  # untimed: what the keep-out ticks did
            res, _ = resolve_counted(arm, q, qd, tw, PERIOD_S, OPTIONS, counter)
            scales.append(res.scale)
            rows.append(len(counter.rows(res.frames, q, res.J)[1]))
        free, kept = np.array(times["free"]) / 1e3, np.array(times["keepout"]) / 1e3
        n_rows = np.array(rows)
        out[name] = {
            "zones": len(section["zone"]), "pairs": passes["keepout"].pair_count,
            "free_median_us": float(np.median(free)), "median_us": float(np.median(kept)),
            "p99_us": float(np.percentile(kept, 99)),
            "ratio_to_free": float(np.median(kept) / np.median(free)),
            "ticks_with_rows": int(np.count_nonzero(n_rows)),
            "rows_median": float(np.median(n_rows)), "rows_max": int(n_rows.max()),
            "ticks_scaled": int(np.count_nonzero(np.array(scales) < 1.0)),
        }
    return out


def print_keepout(f: dict[str, Any]) -> None:
    """The figures as lines of the bench solver report."""
    print(f"keep-out, {f['arm']} ({f['capsules']} capsules), {f['ticks']} recorded states:")
    for name in CELLS:
        c = f[name]
        print(f"  {name:<10} {c['zones']} zones, {c['pairs']} pairs: tick median {c['median_us']:.1f} us "
              f"p99 {c['p99_us']:.1f} us, free tick median {c['free_median_us']:.1f} us, "
              f"ratio_to_free {c['ratio_to_free']:.2f}x; damper rows median {c['rows_median']:g} "
              f"(max {c['rows_max']}, {c['ticks_with_rows']} ticks), "
              f"{c['ticks_scaled']} ticks scaled")
    ratio = f["none_near"]["ratio_to_free"]
    ok = "met" if ratio <= KEEPOUT_NONE_NEAR_TARGET else "MISSED"
    active = f["two_active"]["ratio_to_free"]
    limit = SATURATED_TARGETS["saturated_to_free"]
    ok2 = "met" if active <= limit else "MISSED"
    print(f"  targets: none_near ratio_to_free {ratio:.2f} <= {KEEPOUT_NONE_NEAR_TARGET:g}: {ok}; "
          f"two_active ratio_to_free {active:.2f} <= {limit:g} (the saturated tick's): {ok2}\n")
