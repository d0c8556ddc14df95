"""End to end: `twistrate status`, `twistrate set`, `twistrate check` and `twistrate --version` as a user
runs them, against a `twistrate serve` process (or none)."""

from __future__ import annotations

import json

import pytest
from service_harness import config_dict, reap, serve_process, twistrate

from twistrate.clients.link import Link
from twistrate.service.wire.discovery import write_endpoints
from twistrate.solver.errors import ControlError

pytestmark = pytest.mark.timeout(180)

NOBODY = {"intake": "tcp://127.0.0.1:1", "output": "tcp://127.0.0.1:1", "control": "tcp://127.0.0.1:1"}


def _toml(doc: dict) -> str:
    lines = []
    for section, values in doc.items():
        lines.append(f"[{section}]")
        lines += [f"{k} = {json.dumps(v)}" for k, v in values.items()]
    return "\n".join(lines) + "\n"


def _run(*args, timeout=60):
    proc = twistrate(*args)
    out, err = proc.communicate(timeout=timeout)
    return proc.returncode, out, err


@pytest.fixture(scope="module")
def service(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("svc")
    cfg = tmp / "service.toml"
    cfg.write_text(_toml(config_dict()))
    proc, endpoints = serve_process(cfg, tmp / "ep.json")
    try:
        yield proc, endpoints, str(tmp / "ep.json")
    finally:
        proc.terminate()
        proc.communicate(timeout=30)
        reap(proc)


def test_status_of_a_running_service(service):
    _, _, ep_file = service
    rc, out, err = _run("status", "--endpoints-file", ep_file)
    assert rc == 0, err
    assert "reach7" in out and "mode disabled" in out and "lease free" in out and "health clear" in out
    assert "overruns" in out and "lateness median" in out and "p99" in out
    rc, out, _ = _run("status", "--endpoints-file", ep_file, "--json")
    doc = json.loads(out)
    assert doc["status"]["mode"] == "disabled" and doc["counters"]["ticks"] > 0


def test_status_with_no_service_is_one_line_and_exit_1(tmp_path):
    write_endpoints(tmp_path / "ep.json", NOBODY)
    rc, out, err = _run("status", "--endpoints-file", str(tmp_path / "ep.json"), "--timeout", "1")
    assert rc == 1 and out == "" and len(err.strip().splitlines()) == 1 and "no service answers" in err


def test_set_changes_tunables_with_the_control_ops_errors(service):
    _, endpoints, ep_file = service
    rc, out, err = _run("set", "--endpoints-file", ep_file, "damping_max=0.04", "reduced_speed=true")
    assert rc == 0, err
    assert "damping_max" in out and "0.04" in out and "(changed)" in out
    with Link(endpoints, topics=(), timeout_s=2.0) as link:
        assert link.status()["reduced_speed"] is True
        assert link.status()["holder"] is None  # the command gave the lease back
        # the same refusal as the control op, word for word
        link.claim("probe")
        with pytest.raises(ControlError) as info:
            link.set(damping_max=-1.0)
        link.release()
    rc, _, err = _run("set", "--endpoints-file", ep_file, "damping_max=-1.0")
    assert rc == 2 and str(info.value) in err, (err, str(info.value))
    rc, _, err = _run("set", "--endpoints-file", ep_file, "dampingmax=0.1")
    assert rc == 2 and "dampingmax" in err and "damping_max" in err
    rc, _, err = _run("set", "--endpoints-file", ep_file, "damping_max")
    assert rc == 2 and "NAME=VALUE" in err


def test_set_while_another_client_holds_the_lease_names_it(service):
    _, endpoints, ep_file = service
    with Link(endpoints, topics=(), timeout_s=2.0) as link:
        link.claim("pendant", lease_ms=30_000)
        try:
            rc, _, err = _run("set", "--endpoints-file", ep_file, "damping_max=0.05")
        finally:
            link.release()
    assert rc == 1 and "pendant" in err and "claim: claim:" not in err


def test_check_validates_without_starting_and_speaks_like_serve(tmp_path):
    good = tmp_path / "good.toml"
    good.write_text(_toml(config_dict(recorder={"path": "run.trec"})))
    rc, out, err = _run("check", str(good))
    assert rc == 0 and "valid" in out and "reach7" in out, err
    assert not (tmp_path / "run.trec").exists()  # nothing started, nothing written
    bad = tmp_path / "bad.toml"
    bad.write_text("[tick]\nrat_hz = 500\n")
    rc, _, err = _run("check", str(bad))
    assert rc == 2 and "did you mean 'rate_hz'?" in err and str(bad) in err
    rc_serve, _, err_serve = _run("serve", "--config", str(bad))
    assert rc_serve == 2
    assert err.split(": ", 1)[1] == err_serve.split(": ", 1)[1]  # the same message after the program name
    wrong_arm = tmp_path / "arm.toml"
    wrong_arm.write_text('[arm]\nfile = "no-such-arm"\n')
    rc, _, err = _run("check", str(wrong_arm))
    assert rc == 2 and "no-such-arm" in err


def test_version():
    rc, out, _ = _run("--version")
    assert rc == 0 and out.startswith("twistrate ") and out.split()[1][0].isdigit()
