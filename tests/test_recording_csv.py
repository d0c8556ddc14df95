"""`twistrate record --csv`: the columns are the documented ones (docs/operation.md "CSV export", read from
the document), each cell is the recording's value read back with the standard csv module, NaN is an
empty cell, and an existing file is refused."""

from __future__ import annotations

import csv
import math
import re
from pathlib import Path

import numpy as np
import pytest
from service_harness import twistrate

from twistrate.service import recorder as R  # noqa: N812
from twistrate.service.recording_csv import csv_columns, write_csv
from twistrate.solver.errors import InputError
from twistrate.solver.load import load_arm

DOC = Path(__file__).resolve().parents[1] / "docs" / "operation.md"


def _recording(path):
    arm = load_arm("planar3")
    rec = R.Recorder(path, arm, 500.0)
    for k in range(20):
        limits = np.zeros(arm.n, np.uint8)
        limits[1] = 3 if k == 5 else 0
        tw = None if k < 3 else np.arange(6, dtype=float) * 0.1 + k
        rec.push(2_000_000 * k, 0, k, "running" if k >= 3 else "disabled", "narrow" if k > 10 else "clear",
                 limits, arm.q_home + 0.01 * k, np.full(arm.n, 0.1 * k), tw, tw, 0.5, 1.0, 0.01, 0.2, 0.05)
    rec.close()
    return arm


def test_columns_are_the_documented_ones():
    text = DOC.read_text().split("## CSV export")[1].split("\n## ")[0]
    documented = re.findall(r"^\| `([a-z_{}J]+)` \|", text, flags=re.MULTILINE)
    cols = csv_columns(["a", "b"])
    expanded = []
    for name in documented:
        if "{J}" in name:
            continue
        expanded.append(name)
    per_joint = [name for name in documented if "{J}" in name]
    assert per_joint == ["q_{J}", "qd_{J}", "limits_{J}"]
    twist = [c for c in cols if c.startswith("twist_")]
    assert cols == expanded[:9] + [p.replace("{J}", j) for j in ("a", "b") for p in per_joint] + twist
    assert twist == [f"twist_{w}_{p}" for w in ("desired", "achieved")
                     for p in ("linear_x", "linear_y", "linear_z", "angular_x", "angular_y", "angular_z")]
    assert all(f"twist_{w}_" in text for w in ("desired", "achieved"))


def test_cells_are_the_recordings_values(tmp_path):
    arm = _recording(tmp_path / "r.trec")
    header, rec = R.read_recording(tmp_path / "r.trec")
    write_csv(header, rec, tmp_path / "r.csv")
    with open(tmp_path / "r.csv", newline="") as f:
        rows = list(csv.DictReader(f))
    assert len(rows) == 20
    j = arm.joint_names
    for k, row in enumerate(rows):
        assert float(row["t_s"]) == pytest.approx(0.002 * k) and int(row["tick"]) == k
        assert row["mode"] == ("running" if k >= 3 else "disabled")
        assert row["health"] == ("narrow" if k > 10 else "clear")
        assert float(row[f"q_{j[0]}"]) == rec["q"][k][0] and float(row[f"qd_{j[2]}"]) == rec["qd"][k][2]
        assert int(row[f"limits_{j[1]}"]) == (3 if k == 5 else 0)
        if k < 3:
            assert row["twist_desired_linear_x"] == "" and row["twist_achieved_angular_z"] == ""
        else:
            assert float(row["twist_desired_linear_y"]) == pytest.approx(0.1 + k, rel=1e-6)
            assert float(row["twist_achieved_angular_z"]) == pytest.approx(0.5 + k, rel=1e-6)
        assert not math.isnan(float(row["damping_m"]))
    with pytest.raises(InputError, match="does not exist yet"):
        write_csv(header, rec, tmp_path / "r.csv")


def test_the_command_exports(tmp_path):
    _recording(tmp_path / "r.trec")
    proc = twistrate("record", "--csv", str(tmp_path / "out.csv"), str(tmp_path / "r.trec"))
    out, err = proc.communicate(timeout=60)
    assert proc.returncode == 0, err
    assert "20 rows" in out and (tmp_path / "out.csv").read_text().startswith("t_s,tick,mode,health")
