"""Smoke test of the keep-out benchmark (no timed assertion: speed is for the benchmark to print).
Its cells must be what they claim: no damper row on any tick of `none_near`, rows on every tick of
`two_active` (two or more on at least half of them)."""

from __future__ import annotations

from twistrate.service.bench.keepout import measure, run


def test_cells_are_what_they_claim():
    figures = measure(ticks=1500)
    assert figures["capsules"] == 8
    assert figures["none_near"]["ticks_with_rows"] == 0
    assert figures["two_active"]["ticks_with_rows"] == 1500 and figures["two_active"]["rows_median"] >= 2
    for cell in ("none_near", "two_active"):
        assert figures[cell]["pass_median_us"] > 0 and figures[cell]["resolve_median_us"] > 0


def test_bad_ticks_exit_2(capsys):
    assert run(["--ticks", "3"]) == 2
    assert "--ticks: got 3" in capsys.readouterr().err
