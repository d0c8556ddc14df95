"""docs/protocol.md agrees with the code: it lists every event name the service can emit (read from
the source, so the two cannot drift apart), and its health example is what twistrate.solver.health
computes for that posture."""

from __future__ import annotations

import ast
import json
import re
from pathlib import Path

import msgpack
import numpy as np

from twistrate.service import wire
from twistrate.service.config import load_config
from twistrate.solver.health import assess
from twistrate.solver.kinematics import forward, geometric_jacobian

ROOT = Path(__file__).resolve().parents[1]
DOC = ROOT / "docs" / "protocol.md"
#: Functions that pass an event name through (their own calls carry a variable, checked at their callers).
PASS_THROUGH = {"emit_event", "_set_mode"}


def _emitted_event_names() -> set[str]:
    """Every event name the service code emits: the literal names at the three ways an event is made,
    state.events.append((name, detail)), ServiceState._set_mode(mode, name, detail) and
    Service.emit_event(name, detail). A non-literal name outside the pass-through functions fails."""
    names: set[str] = set()
    for path in sorted((ROOT / "service").rglob("*.py")):
        tree = ast.parse(path.read_text(), str(path))
        for fn in ast.walk(tree):
            if not isinstance(fn, (ast.FunctionDef, ast.AsyncFunctionDef)):
                continue
            for call in ast.walk(fn):
                if not isinstance(call, ast.Call) or not isinstance(call.func, ast.Attribute):
                    continue
                attr, target = call.func.attr, call.func.value
                if attr == "emit_event":
                    node = call.args[0]
                elif attr == "_set_mode":
                    node = call.args[1]
                elif attr == "append" and isinstance(target, ast.Attribute) and target.attr == "events":
                    node = call.args[0].elts[0] if isinstance(call.args[0], ast.Tuple) else call.args[0]
                else:
                    continue
                if isinstance(node, ast.Constant) and isinstance(node.value, str):
                    names.add(node.value)
                else:
                    assert fn.name in PASS_THROUGH, f"{path.name}:{call.lineno}: event name is not a literal"
    return names


def _documented_event_names() -> set[str]:
    text = DOC.read_text()
    section = text.split("## 10.")[1].split("\n## ")[0]
    table = section.split("Events (`event.event`)")[1]
    return set(re.findall(r"^\| `([a-z_]+)` \|", table, flags=re.MULTILINE))


def test_the_document_lists_exactly_the_events_the_service_emits():
    emitted = _emitted_event_names()
    # the scan finds the events made in each of the three ways (it cannot pass by finding none)
    assert {"lease_claimed", "fault", "running", "health", "parameters"} <= emitted
    documented = _documented_event_names()
    assert emitted - documented == set(), "emitted but not in docs/protocol.md section 10"
    assert documented - emitted == set(), "documented but never emitted"


def _doc_health_example() -> dict:
    text = DOC.read_text()
    block = text.split("### 7.4")[1].split("### 7.5")[0].split("```")[1]
    return json.loads(block)


def test_documented_health_example_is_what_solver_health_gives_at_that_posture():
    doc = _doc_health_example()
    msg = wire.decode_health(msgpack.packb(doc), 7)  # a valid health message
    config = load_config()  # the packaged demo configuration: reach7, L = 0.3 m
    arm = config.load_arm()
    options = config.solver_options(arm)
    assert arm.name == "reach7" and options.characteristic_length == 0.3
    q = arm.q_home
    ref = assess(arm, q, geometric_jacobian(arm, forward(arm, q)), options)
    # four digits in the document
    np.testing.assert_allclose(msg.limit_margin, ref.limit_margin, atol=5e-5)
    np.testing.assert_allclose(msg.weakest_linear, ref.weakest_linear, atol=5e-5)
    np.testing.assert_allclose(msg.weakest_angular, ref.weakest_angular, atol=5e-5)
    np.testing.assert_allclose(msg.singular_values, ref.singular_values, atol=5e-5)
    assert abs(msg.inverse_condition - ref.inverse_condition) < 5e-5
    np.testing.assert_allclose([msg.manipulability, msg.manipulability_linear, msg.manipulability_angular],
                               [ref.manipulability, ref.manipulability_translational,
                                ref.manipulability_rotational], rtol=5e-4)
