"""The service state machine: lease, enable/disable, watchdog modes and fault, per the service behaviour
in the design (DESIGN.md, "Service behaviour") and docs/operation.md."""

from __future__ import annotations

import pytest

from twistrate.service import state as S  # noqa: N812
from twistrate.solver.errors import ControlError

MS = 1_000_000


def claimed(now=0, lease_ms=1000.0):
    st = S.ServiceState(lease_ms_default=lease_ms)
    lease = st.claim("op", None, now)
    return st, lease.token


def test_starts_disabled_and_stays_disabled_without_enable():
    st = S.ServiceState()
    assert st.mode == S.DISABLED
    assert st.step(0, True, True, True) == S.DISABLED


def test_enable_needs_the_lease():
    st = S.ServiceState()
    with pytest.raises(ControlError) as err:
        st.enable("nope", 0)
    assert err.value.code == S.E_NO_LEASE
    st, token = claimed()
    with pytest.raises(ControlError):
        st.enable("wrong", 0)
    st.enable(token, 5)
    assert st.epoch_ns == 5
    assert st.step(10, True, True, True) == S.RUNNING


def test_second_claim_refused_until_release_or_expiry():
    st, token = claimed(lease_ms=100.0)
    with pytest.raises(ControlError) as err:
        st.claim("other", None, 50 * MS)
    assert err.value.code == S.E_LEASE_HELD
    other = st.claim("other", None, 100 * MS)  # expired exactly at 100 ms
    assert other.client == "other"
    assert not st.holds(token, 100 * MS)
    assert st.holds(other.token, 100 * MS)


def test_claim_duration_bounds():
    st = S.ServiceState(lease_ms_min=50.0, lease_ms_max=1000.0)
    with pytest.raises(ControlError) as err:
        st.claim("op", 10.0, 0)
    assert err.value.code == S.E_BAD_ARGUMENT
    assert "lease_ms" in str(err.value)


def test_renew_extends_and_expiry_disables():
    st, token = claimed(lease_ms=100.0)
    st.enable(token, 0)
    st.step(1, True, True, True)
    st.renew(token, 80 * MS)
    assert st.step(150 * MS, True, True, False) == S.RUNNING
    assert st.step(180 * MS, True, True, False) == S.DISABLED
    assert st.lease is None and not st.enabled
    names = [e for e, _ in st.events]
    assert "lease_expired" in names and "disabled" in names
    with pytest.raises(ControlError):
        st.renew(token, 181 * MS)


def test_release_disables():
    st, token = claimed()
    st.enable(token, 0)
    st.step(1, True, True, True)
    st.release(token, 2)
    assert st.step(3, True, True, False) == S.DISABLED
    assert st.lease is None


def test_stale_input_stops_then_holds_then_resumes_on_fresh_input():
    st, token = claimed()
    st.enable(token, 0)
    assert st.step(1, True, True, True) == S.RUNNING
    st.events.clear()
    assert st.step(2, False, True, False) == S.STOPPING
    assert st.events[-1][0] == "stale_input" and "twist" in st.events[-1][1]
    assert st.step(3, False, True, False) == S.STOPPING
    assert st.step(4, False, True, True) == S.HOLDING
    assert st.step(5, True, True, True) == S.RUNNING
    assert st.step(6, True, False, False) == S.STOPPING
    assert "joint state" in st.events[-1][1]


def test_fault_is_sticky_until_cleared_and_clear_returns_to_disabled():
    st, token = claimed()
    st.enable(token, 0)
    st.step(1, True, True, True)
    st.fault("joint state out of range")
    assert st.mode == S.FAULT and not st.enabled
    assert st.step(2, True, True, True) == S.FAULT
    with pytest.raises(ControlError) as err:
        st.enable(token, 3)
    assert err.value.code == S.E_FAULT
    st.clear_fault(token, 4)
    assert st.mode == S.DISABLED
    assert st.step(5, True, True, True) == S.DISABLED
    st.enable(token, 6)
    assert st.step(7, True, True, True) == S.RUNNING


def test_shutdown_is_final():
    st, token = claimed()
    st.enable(token, 0)
    st.shutdown("SIGTERM")
    assert st.step(1, True, True, True) == S.SHUTDOWN
    with pytest.raises(ControlError) as err:
        st.enable(token, 2)
    assert err.value.code == S.E_SHUTDOWN
    st.fault("late fault")
    assert st.mode == S.SHUTDOWN


def test_every_mode_change_emits_an_event():
    st, token = claimed()
    st.events.clear()
    seq = [(True, True, True), (False, True, False), (False, True, True), (True, True, True)]
    st.enable(token, 0)
    modes = [S.DISABLED]
    for i, (tw, js, rest) in enumerate(seq):
        before = len(st.events)
        modes.append(st.step(i + 1, tw, js, rest))
        if modes[-1] != modes[-2]:
            assert len(st.events) > before
    assert modes[1:] == [S.RUNNING, S.STOPPING, S.HOLDING, S.RUNNING]
