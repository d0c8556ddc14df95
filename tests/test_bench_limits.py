"""A short run of `twistrate bench limits`: random postures (exact singularities and exact position
limits included), twists and the previous rates resolve() returned; every position, velocity and
acceleration bound held and every output finite on every tick. The bounds are the rate limits of
Flacco, De Luca & Khatib 2012 ("Prioritized multi-task motion control of redundant robots under hard
joint constraints", IROS): q_min <= q + qd T <= q_max, |qd| <= v_max, |qd - qd_prev| <= a_max T."""

from __future__ import annotations

import json

from twistrate.service.bench.cli import main
from twistrate.service.bench.limits import run_limits


def test_random_use_keeps_every_bound_and_meets_singular_and_limit_starts():
    r = run_limits(ticks=480, seed=3, episode_ticks=40)
    assert r["ticks"] == 480 and r["episodes"] == 12
    assert r["exact_singular_starts"] > 0 and r["starts"]["limit"] > 0  # the hard cases were met
    assert r["ok"], r["examples"]


def test_the_command_prints_and_writes_json(tmp_path, capsys):
    out = tmp_path / "limits.json"
    assert main(["limits", "--ticks", "60", "--json", str(out)]) == 0
    assert "every bound held" in capsys.readouterr().out
    doc = json.loads(out.read_text())
    assert doc["benchmark"] == "limits" and doc["ticks"] == 60
