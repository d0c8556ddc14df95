"""End to end: a second `twistrate serve` on the same configuration (its ports in use) fails to start and
leaves the running one's recording intact and readable; a restart never overwrites a recording; the log
says where the service records; the recording path is relative to the config file, not the working
directory."""

from __future__ import annotations

import json
import time

import pytest
from service_harness import config_dict, reap, serve_process, twistrate

from twistrate.service.recorder import read_recording

pytestmark = pytest.mark.timeout(120)


def _toml(doc: dict) -> str:
    lines = []
    for section, values in doc.items():
        lines.append(f"[{section}]")
        lines += [f"{k} = {json.dumps(v)}" for k, v in values.items()]
    return "\n".join(lines) + "\n"


def _wait_for_records(path, limit_s=20.0):
    end = time.monotonic() + limit_s
    while time.monotonic() < end:
        if path.exists() and path.stat().st_size > 4096:
            return
        time.sleep(0.05)
    raise AssertionError(f"{path} never grew")


def test_a_second_serve_leaves_the_running_recording_intact(tmp_path):
    conf_dir = tmp_path / "conf"
    elsewhere = tmp_path / "cwd"
    conf_dir.mkdir()
    elsewhere.mkdir()
    first_cfg = conf_dir / "service.toml"
    first_cfg.write_text(_toml(config_dict(recorder={"path": "run.trec"}, logging={"level": "info"})))
    recording = conf_dir / "run.trec"  # relative to the config file, not to the working directory
    proc, endpoints = serve_process(first_cfg, tmp_path / "ep1.json", cwd=elsewhere)
    second = third = None
    try:
        _wait_for_records(recording)
        assert not (elsewhere / "run.trec").exists()
        before = recording.read_bytes()[:4096]
        # the same configuration with the ports the first one bound: the bind must fail
        same = conf_dir / "same.toml"
        same.write_text(_toml(config_dict(
            recorder={"path": "run.trec"}, logging={"level": "info"},
            endpoints={"intake": endpoints.intake, "output": endpoints.output,
                       "control": endpoints.control})))
        second = twistrate("serve", "--config", str(same), cwd=elsewhere)
        _, err2 = second.communicate(timeout=60)
        assert second.returncode != 0, err2
        assert "cannot start" in err2
        assert recording.read_bytes()[:4096] == before  # header and first records untouched
        header, rec = read_recording(recording)  # still a readable recording
        assert header["format"] == "trec" and len(rec) > 0
    finally:
        proc.terminate()
        _, err1 = proc.communicate(timeout=30)
        reap(proc, *(p for p in (second, third) if p is not None))
    assert proc.returncode == 0, err1
    assert f"recording every tick to {recording}" in err1
    header, rec = read_recording(recording)
    assert len(rec) > 100
    size = recording.stat().st_size
    # a restart on the same file refuses, naming it, and leaves it as it was
    third = twistrate("serve", "--config", str(first_cfg), "--endpoints-file", str(tmp_path / "ep3.json"),
                      cwd=elsewhere)
    _, err3 = third.communicate(timeout=60)
    assert third.returncode != 0 and "never overwrites" in err3 and str(recording) in err3, err3
    assert recording.stat().st_size == size
    assert not (tmp_path / "ep3.json").exists()
