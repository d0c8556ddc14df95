"""A second-language client: JavaScript written from docs/protocol.md alone, with its own ZMTP 3.0
peer and msgpack codec (tests/js/), against a real service.

It checks what a client in another language depends on and the Python stack hides: the greeting
and framing of the ZeroMQ transport (ZeroMQ RFC 23/ZMTP 3.0), msgpack as the 2013 specification
writes it (msgpack.org), 64-bit integers kept exact (docs/protocol.md section 16), the worked
example's bytes (section 14), the DEALER form of control (section 1), and the refusal of a float
`stamp_ns` (section 16). Node.js comes from Debian's `nodejs` package (tests/setup_browser.py
installs it); without it the test skips and says so.
"""

from __future__ import annotations

import json
import math
import re
import shutil
import subprocess
from pathlib import Path

import msgpack
import numpy as np
import pytest

from tests.service_harness import make_config, running_service

JS = Path(__file__).parent / "js" / "client.mjs"
PROTOCOL = Path(__file__).parent.parent / "docs" / "protocol.md"
NODE = shutil.which("node") or shutil.which("nodejs")

pytestmark = pytest.mark.skipif(NODE is None, reason="no node on this machine: run tests/setup_browser.py "
                                                      "as root (apt-get install nodejs)")


def node(*args: str, timeout: float = 60.0) -> str:
    done = subprocess.run([NODE, str(JS), *args], capture_output=True, text=True, timeout=timeout)
    assert done.returncode == 0, done.stderr
    return done.stdout.strip()


def example_bytes_from_doc() -> bytes:
    """The 181 bytes of section 14's twist as the document prints them (hex pairs before the comments)."""
    text = PROTOCOL.read_text()
    block = text.split("and these 181 bytes:", 1)[1].split("```", 2)[1]
    hexes = []
    for line in block.splitlines():
        hexes += re.findall(r"\b[0-9a-f]{2}\b", line.split("  ")[0] if not line.startswith("   ") else line)
    return bytes.fromhex("".join(hexes))


def test_the_js_encoder_writes_the_worked_example_byte_for_byte():
    # docs/protocol.md section 14 prints the encoding; msgpack-python (a reference encoder from PyPI)
    # gives the same bytes for the same map in the same key order.
    doc = example_bytes_from_doc()
    assert len(doc) == 181
    ref = msgpack.packb({"proto": 1, "kind": "twist", "seq": 3, "stamp_ns": 1700000000000000000,
                         "linear": [0.1, 0.0, 0.2], "angular": [0.0, 0.0, 0.5], "frame": "tool",
                         "point": [0.0, 0.0, 0.1], "lease": "ab12cd34ef56ab78"})
    assert ref == doc
    assert bytes.fromhex(node("encode-example")) == doc


def test_a_js_client_from_the_document_drives_the_service(tmp_path):
    with running_service(make_config()) as run:
        endpoints = tmp_path / "endpoints.json"
        endpoints.write_text(json.dumps({"intake": run.endpoints.intake, "output": run.endpoints.output,
                                         "control": run.endpoints.control}))
        out = json.loads(node("run", str(endpoints)))
    n = out["arm_n"]
    assert out["peer_types"] == ["ROUTER", "PUB", "SUB"]  # section 1's socket table
    assert out["status"]["n"] == n == 7 and out["status"]["simulated"] is True
    # section 10: enable moves `disabled` -> `holding`; a fresh twist makes it `running`.
    assert out["enabled"] == "holding" and out["disabled"] == "disabled"
    # Its twists were accepted and answered: commands name their seqs (section 6, `answers`).
    assert out["accepted_twist_after"] - out["accepted_twist_before"] >= out["sent"] // 2
    assert out["answered"] >= out["sent"] // 2
    # A float stamp_ns is refused as bad_type, exactly once (section 16).
    assert out["bad_type_after"] - out["bad_type_before"] == 1
    for item in out["sample"]:
        cmd = item["command"]
        # The JS decoder agrees with msgpack-python on the same bytes, field by field.
        ref = msgpack.unpackb(bytes.fromhex(item["bytes"]))
        assert set(cmd) == set(ref)
        for key in ("tick", "seq", "answers", "stamp_ns"):
            assert int(cmd[key]) == ref[key]  # 64-bit integers kept exact (BigInt when beyond 2^53)
        assert cmd["rate"] == ref["rate"] and cmd["target"] == ref["target"]
        assert len(cmd["rate"]) == n and all(math.isfinite(x) for x in cmd["rate"])
        assert cmd["mode"] == "running" and 0.0 <= cmd["scale"] <= 1.0
    # The arm moved: commanded rates are not all zero while the twist is followed.
    assert any(np.abs(item["command"]["rate"]).max() > 0.0 for item in out["sample"])
