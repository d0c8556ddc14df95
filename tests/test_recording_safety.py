"""Recordings never lose data: the file is created exclusively (an existing one is refused, never
overwritten), `{time}` names it by the start time, a recorder never opened leaves no file, the size cap
stops the recording with a notice, and a full disk (a write raising ENOSPC) stops the recording, never
the tick: the running service publishes the `recording_stopped` event and keeps ticking."""

from __future__ import annotations

import errno
import re

import numpy as np
import pytest
from service_harness import make_config, running_service, wait_for

from twistrate.service import recorder as R  # noqa: N812
from twistrate.service.config import config_from_dict
from twistrate.solver.errors import InputError
from twistrate.solver.load import load_arm


@pytest.fixture
def arm():
    return load_arm("reach7")


def _push(rec, k, arm):
    z = np.zeros(arm.n)
    rec.push(2_000_000 * k, 1_700_000_000_000_000_000, k, "running", "clear", np.zeros(arm.n, np.uint8),
             arm.q_home, z, np.zeros(6), np.zeros(6), 1.0, 1.0, 0.0, 0.1, 0.01)


class FullDisk:
    """A file object whose writes fail as on a full disk (errno ENOSPC)."""

    closed = False

    def write(self, data):
        raise OSError(errno.ENOSPC, "No space left on device")

    def flush(self):
        pass

    def close(self):
        self.closed = True


def test_an_existing_file_is_refused_and_left_as_it_was(tmp_path, arm):
    path = tmp_path / "run.trec"
    path.write_bytes(b"somebody's data")
    with pytest.raises(InputError, match="never overwrites") as info:
        R.Recorder(path, arm, 500.0)
    assert "run.trec" in str(info.value) and "{time}" in str(info.value)
    assert path.read_bytes() == b"somebody's data"


def test_time_in_the_name_gives_a_new_file_each_start(tmp_path, arm):
    rec = R.Recorder(tmp_path / "run-{time}.trec", arm, 500.0)
    _push(rec, 0, arm)
    rec.close()
    assert re.fullmatch(r"run-\d{8}T\d{6}Z\.trec", rec.path.name), rec.path
    _, data = R.read_recording(rec.path)
    assert len(data) == 1
    assert R.expand_path("a-{time}.trec", 0.0).name == "a-19700101T000000Z.trec"


def test_a_recorder_never_opened_leaves_no_file(tmp_path, arm):
    rec = R.Recorder(tmp_path / "later.trec", arm, 500.0, open_now=False)
    _push(rec, 0, arm)
    rec.close()
    assert not (tmp_path / "later.trec").exists()


def test_the_size_cap_stops_the_recording_with_a_notice(tmp_path, arm):
    itemsize = R.record_dtype(arm.n).itemsize
    rec = R.Recorder(tmp_path / "cap.trec", arm, 500.0, max_bytes=2000 + 10 * itemsize)
    for k in range(200):
        _push(rec, k, arm)
    rec.close()
    _, data = R.read_recording(tmp_path / "cap.trec")
    assert 0 < len(data) < 200 and (tmp_path / "cap.trec").stat().st_size <= 2000 + 10 * itemsize
    assert rec.stopped is not None and "size cap" in rec.stopped
    notice = rec.take_notice()
    assert notice is not None and "size cap" in notice and rec.take_notice() is None
    _push(rec, 300, arm)  # after the stop, pushing is a no-op (the tick never fails on it)
    assert rec.rows == 200


def test_a_full_disk_stops_the_recording_not_the_writer_caller(tmp_path, arm):
    rec = R.Recorder(tmp_path / "full.trec", arm, 500.0)
    rec._file.close()
    rec._file = FullDisk()
    for k in range(5):
        _push(rec, k, arm)
    rec._flush()  # what the writer thread does every FLUSH_S: must not raise
    assert rec.stopped is not None and "write failed" in rec.stopped and "No space" in rec.stopped
    _push(rec, 9, arm)
    rec.close()


def test_a_full_disk_publishes_recording_stopped_and_the_tick_goes_on(tmp_path, arm):
    cfg = make_config()
    rec = R.Recorder(tmp_path / "svc.trec", arm, cfg.tick.rate_hz)
    rec._file.close()
    rec._file = FullDisk()
    with running_service(cfg, recorder=rec) as run:
        link = run.link(topics=(b"event",))
        event = None
        for _ in range(50):
            event = link.receive_event(timeout_s=2.0)
            if event.event == "recording_stopped":
                break
        assert event is not None and event.event == "recording_stopped", event
        assert "write failed" in event.detail
        ticks = run.service.ticker.ticks
        wait_for(lambda: run.service.ticker.ticks > ticks + 50)  # still ticking
        assert not run.service.done


def test_the_recording_path_resolves_against_the_config_file(tmp_path):
    cfg = config_from_dict({"recorder": {"path": "rec/run.trec"}}, tmp_path)
    assert cfg.recorder.path == str(tmp_path / "rec" / "run.trec")
