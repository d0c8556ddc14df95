"""Every copy of an enumeration in the code and the docs equals the protocol's constant
(twistrate.service.wire.constants), the one source. The solver cannot import the wire (layers), so
it keeps its own copies; config Literals, the recorder header and docs/protocol.md's tables are
read here and compared."""

from __future__ import annotations

import re
import typing
from pathlib import Path

from twistrate.service import config_sections as service_config
from twistrate.service import state as service_state
from twistrate.service import wire
from twistrate.solver import arm as solver_arm
from twistrate.solver import health as solver_health
from twistrate.solver import options as solver_options
from twistrate.solver import resolve as solver_resolve

ROOT = Path(__file__).resolve().parents[1]
PROTOCOL = (ROOT / "docs" / "protocol.md").read_text()


def _section(title_prefix: str) -> str:
    return PROTOCOL.split(f"\n## {title_prefix}")[1].split("\n## ")[0]


def _table_keys(text: str) -> list[str]:
    """The backticked first cells of every markdown table row in `text`, in order."""
    return re.findall(r"^\| `([a-z_]+)`\s*\|", text, flags=re.MULTILINE)


def test_solver_copies_equal_the_wire_constants():
    assert solver_health.STATES == wire.HEALTH_STATES
    assert solver_options.DAMPING_POLICIES == wire.DAMPING_POLICIES
    assert typing.get_args(solver_options.DampingPolicy) == wire.DAMPING_POLICIES
    assert typing.get_args(solver_resolve.TwistFrame) == wire.TWIST_FRAMES
    assert (solver_arm.REVOLUTE, solver_arm.PRISMATIC) == wire.JOINT_KINDS


def test_service_copies_equal_the_wire_constants():
    assert service_state.MODES is wire.MODES
    assert typing.get_args(service_config.Damping) == wire.DAMPING_POLICIES
    codes = {service_state.E_NO_LEASE, service_state.E_LEASE_HELD, service_state.E_FAULT,
             service_state.E_SHUTDOWN, service_state.E_BAD_ARGUMENT}
    assert codes <= set(wire.ERROR_CODES)


def test_protocol_document_tables_equal_the_wire_constants():
    modes_and_events = _section("10.")
    assert _table_keys(modes_and_events.split("Health states")[0]) == list(wire.MODES)
    control = _section("8.")
    assert _table_keys(control.split("### 8.3")[1].split("### 8.4")[0]) == list(wire.ERROR_CODES)
    reasons = _section("11.").split("Reasons found by the service")[0]
    assert _table_keys(reasons) == list(wire.REASONS)
    for state in wire.HEALTH_STATES:
        assert f"`{state}`" in modes_and_events.split("Health states")[1].split("Events")[0]
    damping_row = re.search(r"^\| `damping` \|.*$", control, flags=re.MULTILINE).group(0)
    assert re.findall(r"`([a-z_]+)`", damping_row)[1:] == list(wire.DAMPING_POLICIES)
    ops = re.findall(r"^\| `([a-z_]+)`\s*\|", control.split("### 8.1")[1].split("### 8.2")[0],
                     flags=re.MULTILINE)
    assert ops == list(wire.OPS)
