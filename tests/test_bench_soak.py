"""`twistrate bench soak`: a short run end to end (service, driver, twist sources and watcher in their own
processes), its JSON's identities and memory figures; and the soak's arithmetic on numbers worked by hand.

The identities are those of docs/protocol.md section 11 (every message taken from the intake counted
exactly once: accepted, refused by reason, or superseded), 6 and 7.3 (a command every tick, `seq` +1 per
message), 10 (one event per lease claim, release and enable) and 7.4 (health `overruns` never
decreases); service/bench/soak_checks.py states each. No timed assertion: the run's overruns, lateness
and memory slope are printed, only their presence is checked.
"""

from __future__ import annotations

import json
import math
import subprocess
import sys

import pytest

from twistrate.service.bench.soak import schedule
from twistrate.service.bench.soak_checks import identities, memory_growth, warmup_s

pytestmark = pytest.mark.timeout(300)


def test_a_short_soak_checks_every_identity_and_reports_memory(tmp_path):
    out = tmp_path / "soak.json"
    proc = subprocess.run([sys.executable, "-m", "twistrate.service.commands.cli", "bench", "soak",
                           "--minutes", "0.25", "--floor-seconds", "2", "--json", str(out)],
                          capture_output=True, text=True, timeout=280)
    print(proc.stdout[-3000:], proc.stderr[-2000:])
    doc = json.loads(out.read_text())
    names = " ".join(ch["name"] for ch in doc["identities"])
    for section in ("protocol 11", "protocol 6, 7.3", "protocol 10", "protocol 7.4"):
        assert section in names
    failed = [ch for ch in doc["identities"] if not ch["ok"]]
    assert not failed, failed
    assert proc.returncode == 0 and doc["ok"]
    # the run did what it says: lease handed over, sources stopped and resumed, refusals provoked
    sent, events = doc["sent"], doc["watch"]["events"]
    assert sent["claims"] >= 4 and sent["releases"] == sent["claims"]
    assert events.get("stale_input", 0) >= 1 and events.get("running", 0) >= 2
    assert doc["counters"]["rejected_not_leased"] == sent["twists_released_token"] > 0
    assert doc["schedule"]["scaled"] and doc["schedule"]["handover_s"] == pytest.approx(15 / 4)
    mem = doc["memory"]
    assert mem["fitted_samples"] >= 3 and math.isfinite(mem["growth_mb_per_h"])
    assert mem["rss_first_mb"] > 0 and mem["rss_max_mb"] >= mem["rss_last_mb"]
    assert doc["floor"]["ticks"] > 0 and math.isfinite(doc["overrun_points_above_floor"])
    assert "resident memory" in proc.stdout and "MB/h" in proc.stdout


def test_memory_growth_is_the_least_squares_slope_after_the_warm_up():
    # worked by hand: after the warm-up the samples lie on rss = 50 + 2 t_h (MB, t in hours), so the
    # least-squares slope is exactly 2 MB/h; the warm-up samples (a jump of 30 MB) are left out
    fitted = [(t, 50.0 + 2.0 * t / 3600.0) for t in (60.0, 600.0, 1800.0, 3600.0)]
    samples = [(0.0, 20.0), (5.0, 40.0), *fitted]
    m = memory_growth(samples, warm_s=30.0)
    assert m["growth_mb_per_h"] == pytest.approx(2.0, rel=1e-9) and m["fitted_samples"] == 4
    assert m["rss_first_mb"] == 20.0 and m["rss_max_mb"] == pytest.approx(52.0)
    # residuals +1, -1, -1, +1 about a flat line at t = 10 .. 40 s: sum((t - 25) r) = 0, so slope 0
    flat = [(float(t), 60.0 + (1.0 if t in (10, 40) else -1.0)) for t in (10, 20, 30, 40)]
    assert memory_growth(flat, warm_s=0.0)["growth_mb_per_h"] == pytest.approx(0.0, abs=1e-9)
    assert math.isnan(memory_growth(samples[:3], warm_s=30.0)["growth_mb_per_h"])  # too few samples
    assert warmup_s(15.0) == 5.0 and warmup_s(3600.0) == 120.0 and warmup_s(240.0) == 60.0


def test_the_handover_is_a_minute_in_long_runs_and_scaled_in_short_ones():
    assert schedule(3600.0)["handover_s"] == 60.0 and not schedule(3600.0)["scaled"]
    short = schedule(20.0)
    assert short["handover_s"] == 5.0 and short["scaled"] and short["silent_s"] >= 0.3


def _consistent():
    sent = {"twists_leased": 1000, "twists_released_token": 6, "bad_version": 2, "not_msgpack": 2,
            "claims": 2, "releases": 2, "enables": 2}
    driver = {"joints_sent": 5000}
    counters = {"accepted_twist": 990, "accepted_joints": 4980, "superseded": 30, "rejected_total": 10,
                "rejected_not_leased": 6, "rejected_bad_version": 2, "rejected_not_msgpack": 2,
                "rejected_bad_type": 0, "commands": 9000, "ticks": 9100}
    watch = {"commands": 8000, "first_seq": 1000, "last_seq": 8999, "seq_minus_tick": -100, "offsets_seen": 1,
             "events": {"lease_claimed": 2, "lease_released": 2, "enabled": 2}, "event_gaps": 0,
             "health": 400, "health_overruns_decreased": 0, "health_rejected_max": {"not_leased": 6}}
    return sent, driver, counters, watch


def test_identities_hold_on_consistent_counts_and_each_fails_on_its_own_defect():
    assert all(ch["ok"] for ch in identities(*_consistent()))
    defects = {
        "intake": lambda s, d, c, w: d.__setitem__("joints_sent", 5001),  # one state lost unseen
        "refused by reason": lambda s, d, c, w: c.update(rejected_bad_type=1, rejected_total=11,
                                                         superseded=29),
        "superseded per topic": lambda s, d, c, w: c.update(accepted_twist=1001, accepted_joints=4969),
        "a command every tick": lambda s, d, c, w: w.__setitem__("offsets_seen", 2),  # a tick without one
        "events": lambda s, d, c, w: w["events"].__setitem__("lease_released", 1),
        "health": lambda s, d, c, w: w.__setitem__("health_rejected_max", {"not_leased": 7}),
    }
    for name, spoil in defects.items():
        case = _consistent()
        spoil(*case)
        failed = [ch["name"] for ch in identities(*case) if not ch["ok"]]
        assert len(failed) >= 1 and any(f.startswith(name) for f in failed), (name, failed)
    case = _consistent()
    case[3]["commands"] = 7999  # one command dropped between the service and the watcher
    assert [ch["ok"] for ch in identities(*case)][3] is False


def test_a_helper_that_dies_without_figures_is_reported_with_its_exit_code_and_stderr():
    # The soak reads each helper process's last JSON line; one that crashed (a traceback, exit 1)
    # must be named with its exit code and the end of its stderr, not as an empty output.
    from twistrate.service.bench.soak import _last_json

    crash = "import sys; sys.stderr.write('boom at tick 7'); sys.exit(3)"
    proc = subprocess.Popen([sys.executable, "-c", crash], stdout=subprocess.PIPE, stderr=subprocess.PIPE,
                            text=True)
    out, err = proc.communicate(timeout=30)
    with pytest.raises(RuntimeError, match=r"twist source process \(exit code 3\).*boom at tick 7"):
        _last_json("twist source", proc, out, err)
    assert _last_json("driver", proc, 'noise\n{"sent": 4}\n', "") == {"sent": 4}
