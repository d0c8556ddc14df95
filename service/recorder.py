"""Recordings: every tick to a compact file of our own format (writer thread), read back, summarised (the
SVG plot is in twistrate.service.recording_plot, re-exported here).

File format ("trec", version 1; all little-endian):

    offset 0   8 bytes   magic b"TWRREC1\\n"
    offset 8   4 bytes   uint32 H: length of the header
    offset 12  H bytes   header: UTF-8 JSON object (keys below)
    then       records, each exactly header["record_bytes"] long, back to back, until end of file
               (a trailing partial record, from a crash, is ignored)

Header keys: format ("trec"), version (1), arm (name), joints (names, joint order), n, tick_hz,
source ("service": written by the service itself; "output": rebuilt from the output stream by
`twistrate record`), started_unix_ns (wall clock at the first record), modes and health_states
(the names that the integer codes index), fields ([name, numpy type string, shape] per field, in
record order: numpy.dtype(fields) reads the records), unavailable (fields the source could not
know, stored as NaN or 0).

Record fields (SI; base frame; twists rows (v, w) at the tool point):
    t (<f8, s since the first record), tick (<u8), mode (u1), health (u1),
    limits ((n,) u1, bits 1 position, 2 velocity, 4 acceleration limit active),
    q ((n,) <f8, joint positions used this tick), qd ((n,) <f8, commanded rates),
    twist_desired ((6,) <f4, after the speed caps; NaN when not running),
    twist_achieved ((6,) <f4, J qd; NaN when not running),
    scale (<f4, task scaling of the hard limits), cap (<f4, speed-cap factor),
    damping (<f4, m), sigma_min (<f4, smallest task-weighted singular value, m),
    manipulability (<f4, product of the task-weighted singular values; NaN when unknown).

The tick thread only copies one row into a preallocated ring buffer; a writer thread appends full
rows to the file every FLUSH_S. If the writer falls a whole ring behind, rows are dropped and
counted (`dropped`), never waited for.

A recording never overwrites a file: `open()` creates it exclusively (an existing file is refused
with a clear message; `{time}` in the path becomes the UTC start time, e.g. `run-{time}.trec`). The
service opens its recording only once its sockets are bound, so a service that fails to start
touches no file. A write error (a full disk) or the size cap (`max_bytes`) stops the recording,
never the tick: the writer thread sets `notice`, which the tick thread turns into the
`recording_stopped` event (`take_notice`).
"""

from __future__ import annotations

import contextlib
import json
import math
import os
import struct
import threading
import time
from pathlib import Path
from typing import Any

import numpy as np

from twistrate.service.state import MODES
from twistrate.service.wire import HEALTH_STATES
from twistrate.solver.arm import Arm
from twistrate.solver.errors import InputError, field_error

MAGIC = b"TWRREC1\n"
FORMAT = "trec"
VERSION = 1
#: Writer thread period, s.
FLUSH_S = 0.1
#: Ring buffer length, s of ticks (at least MIN_RING records).
RING_S = 4.0
MIN_RING = 1024
#: `{time}` in a recording path becomes the UTC start time in this format.
TIME_PLACEHOLDER = "{time}"
TIME_FORMAT = "%Y%m%dT%H%M%SZ"


def expand_path(path: str | Path, wall_s: float | None = None) -> Path:
    """`path` with TIME_PLACEHOLDER replaced by the UTC time wall_s (default now), TIME_FORMAT."""
    text = str(path)
    if TIME_PLACEHOLDER in text:
        stamp = time.strftime(TIME_FORMAT, time.gmtime(time.time() if wall_s is None else wall_s))
        text = text.replace(TIME_PLACEHOLDER, stamp)
    return Path(text)


def record_dtype(n: int) -> np.dtype:
    """The packed little-endian record type for an n-joint arm."""
    return np.dtype([
        ("t", "<f8"), ("tick", "<u8"), ("mode", "u1"), ("health", "u1"), ("limits", "u1", (n,)),
        ("q", "<f8", (n,)), ("qd", "<f8", (n,)), ("twist_desired", "<f4", (6,)),
        ("twist_achieved", "<f4", (6,)), ("scale", "<f4"), ("cap", "<f4"), ("damping", "<f4"),
        ("sigma_min", "<f4"), ("manipulability", "<f4"),
    ])


def _fields_of(dtype: np.dtype) -> list[list[Any]]:
    out = []
    for name in dtype.names or ():
        sub = dtype.fields[name][0]
        base = sub.base if sub.shape else sub
        out.append([name, base.str, list(sub.shape)])
    return out


class Recorder:
    """Append-only recording of one arm's ticks.

    path : output file, created exclusively (never overwritten; `{time}` becomes the UTC start
    time). arm : the arm (joint names, n). tick_hz : tick rate. source : "service" or "output".
    unavailable : field names the source cannot fill. capacity : ring length in rows (default
    RING_S of ticks, at least MIN_RING). open_now : create the file now (False: at `open()`, which
    the service calls once its sockets are bound). max_bytes : stop recording before the file
    would grow past this size (None: no cap).
    """

    def __init__(self, path: str | Path, arm: Arm, tick_hz: float, source: str = "service",
                 unavailable: tuple[str, ...] = (), capacity: int | None = None, open_now: bool = True,
                 max_bytes: int | None = None) -> None:
        self.path = Path(path)
        self.max_bytes = max_bytes
        self.bytes_written = 0
        #: why the recording stopped early (write error, size cap), or None
        self.stopped: str | None = None
        #: set with `stopped` by the writer thread; taken once by the tick thread (take_notice)
        self.notice: str | None = None
        self.n = arm.n
        self.dtype = record_dtype(arm.n)
        if capacity is None:
            capacity = max(MIN_RING, int(RING_S * tick_hz))
        self._ring = np.zeros(capacity, dtype=self.dtype)
        self._cap = capacity
        self._w = 0  # rows pushed (tick thread)
        self._r = 0  # rows written (writer thread)
        self.dropped = 0
        self.t0_ns: int | None = None
        self._header = {
            "format": FORMAT, "version": VERSION, "arm": arm.name, "joints": list(arm.joint_names),
            "n": arm.n,
            "tick_hz": float(tick_hz), "source": source, "started_unix_ns": 0, "modes": list(MODES),
            "health_states": list(HEALTH_STATES), "fields": _fields_of(self.dtype),
            "record_bytes": self.dtype.itemsize, "unavailable": list(unavailable),
        }
        self._file: Any = None
        self._header_written = False
        self._stop = threading.Event()
        self._lock = threading.Lock()
        self._thread = threading.Thread(target=self._writer, name="twistrate-recorder", daemon=True)
        if open_now:
            self.open()

    @property
    def is_open(self) -> bool:
        return self._file is not None

    def open(self) -> None:
        """Create the file exclusively and start the writer thread (idempotent). Raises InputError
        when the file exists or cannot be created; then nothing was written."""
        if self._file is not None:
            return
        path = expand_path(self.path)
        try:
            self._file = open(path, "xb")  # noqa: SIM115 (closed by close())
        except FileExistsError:
            raise field_error(InputError, "recording path", str(path),
                              "a file that does not exist yet (a recording never overwrites one: move it, "
                              f"or put {TIME_PLACEHOLDER} in the name for the start time)") from None
        except OSError as exc:
            raise field_error(InputError, "recording path", str(path),
                              f"a writable file ({exc.strerror})") from None
        self.path = path
        self._thread.start()

    def take_notice(self) -> str | None:
        """Why the recording stopped, once (tick thread); None when there is nothing new."""
        notice = self.notice
        if notice is not None:
            self.notice = None
        return notice

    # -- tick thread ---------------------------------------------------------------------------------

    def push(self, t_ns: int, wall_ns: int, tick: int, mode: str, health: str, limits: np.ndarray,
             q: np.ndarray, qd: np.ndarray, twist_desired: np.ndarray | None,
             twist_achieved: np.ndarray | None, scale: float, cap: float, damping: float,
             sigma_min: float, manipulability: float) -> None:
        """Copy one tick into the ring (no I/O, no allocation beyond numpy scalars).

        t_ns : monotonic time of the tick, ns. wall_ns : wall clock (only the first one is kept).
        """
        w = self._w
        if self.stopped is not None:
            return
        if w - self._r >= self._cap:
            self.dropped += 1
            return
        if self.t0_ns is None:
            self.t0_ns = t_ns
            self._header["started_unix_ns"] = int(wall_ns)
        row = self._ring[w % self._cap]
        row["t"] = (t_ns - self.t0_ns) * 1e-9
        row["tick"] = tick
        row["mode"] = MODES.index(mode)
        row["health"] = HEALTH_STATES.index(health)
        row["limits"] = limits
        row["q"] = q
        row["qd"] = qd
        row["twist_desired"] = math.nan if twist_desired is None else twist_desired
        row["twist_achieved"] = math.nan if twist_achieved is None else twist_achieved
        row["scale"] = scale
        row["cap"] = cap
        row["damping"] = damping
        row["sigma_min"] = sigma_min
        row["manipulability"] = manipulability
        self._w = w + 1

    # -- writer thread -------------------------------------------------------------------------------

    def _write_header(self) -> None:
        text = json.dumps(self._header, separators=(",", ":")).encode("utf-8")
        data = MAGIC + struct.pack("<I", len(text)) + text
        self._file.write(data)
        self.bytes_written += len(data)
        self._header_written = True

    def _stop_recording(self, why: str) -> None:
        """Stop for good (writer side): keep what is written, close the file, leave a notice."""
        self.stopped = why
        with contextlib.suppress(OSError):
            self._file.close()
        self.notice = why

    def _flush(self) -> None:
        with self._lock:
            w = self._w
            r = self._r
            if w == r or self._file is None or self._file.closed or self.stopped is not None:
                return
            try:
                if not self._header_written:
                    self._write_header()
                cap = self._cap
                a, b = r % cap, w % cap
                if a < b:
                    chunks = [self._ring[a:b]]
                else:
                    chunks = [self._ring[a:], self._ring[:b]]
                capped = False
                for chunk in chunks:
                    if self.max_bytes is not None:
                        room = (self.max_bytes - self.bytes_written) // self.dtype.itemsize
                        if room < len(chunk):
                            chunk, capped = chunk[:max(0, room)], True
                    data = chunk.tobytes()
                    self._file.write(data)
                    self.bytes_written += len(data)
                    if capped:
                        break
                self._r = w
                self._file.flush()
            except OSError as exc:
                self._stop_recording(f"{self.path}: write failed ({exc.strerror or exc}); the recording "
                                     f"stopped after {self._on_disk()} bytes, the service goes on")
                return
            if capped:
                self._stop_recording(f"{self.path}: size cap of {self.max_bytes} bytes reached; the "
                                     "recording stopped, the service goes on ([recorder] max_mb)")

    def _on_disk(self) -> int:
        """The file's size as the file system has it, bytes (after a failed write the buffered writer may
        hold more than reached the disk; bytes_written counts what was handed to it)."""
        try:
            return os.fstat(self._file.fileno()).st_size
        except (OSError, ValueError, AttributeError):
            return self.bytes_written

    def _writer(self) -> None:
        while not self._stop.wait(FLUSH_S):
            self._flush()

    def close(self) -> None:
        """Write what is left and close the file (any thread; idempotent)."""
        self._stop.set()
        if self._file is None:  # never opened: no file
            return
        if threading.current_thread() is not self._thread and self._thread.is_alive():
            self._thread.join(2.0)
        self._flush()
        with self._lock:
            if not self._file.closed:
                try:
                    if not self._header_written:
                        self._write_header()
                except OSError as exc:
                    self.stopped = self.notice = f"{self.path}: write failed ({exc.strerror or exc})"
                with contextlib.suppress(OSError):
                    self._file.close()

    @property
    def rows(self) -> int:
        return self._w


# ==================================================================================================
# reading, summary, plot
# ==================================================================================================


def read_recording(path: str | Path) -> tuple[dict[str, Any], np.ndarray]:
    """(header, records) of a recording; records is a structured array (record_dtype fields)."""
    path = Path(path)
    try:
        data = path.read_bytes()
    except OSError as exc:
        raise field_error(InputError, "recording", str(path), f"a readable file ({exc.strerror})") from None
    if data[:8] != MAGIC or len(data) < 12:
        raise field_error(InputError, "recording", str(path), f"a file starting with {MAGIC!r}")
    (h,) = struct.unpack("<I", data[8:12])
    try:
        header = json.loads(data[12:12 + h].decode("utf-8"))
        dtype = np.dtype([(name, typ, tuple(shape)) if shape else (name, typ)
                          for name, typ, shape in header["fields"]])
    except (ValueError, KeyError, TypeError) as exc:
        raise field_error(InputError, "recording header", str(path), f"a valid trec header ({exc})") from None
    if header.get("format") != FORMAT or header.get("version") != VERSION:
        raise field_error(InputError, "recording version", (header.get("format"), header.get("version")),
                          f"format {FORMAT!r} version {VERSION}")
    body = data[12 + h:]
    count = len(body) // dtype.itemsize
    records = np.frombuffer(body[:count * dtype.itemsize], dtype=dtype)
    return header, records


def limit_events(prev: np.ndarray, new: np.ndarray) -> int:
    """The one definition of a limit event: a joint whose limit bits gain a bit it did not have the tick
    before (one event per joint and tick). prev, new : (n,) or (ticks, n) uint8 limit bits. Used by the
    service's `limit_events` counter and by the recording summary alike."""
    return int(np.count_nonzero(new & ~prev))


def _rising_edges(bits: np.ndarray) -> int:
    """Limit events over a recording's (ticks, n) limit bits (the first row against no limits)."""
    if len(bits) == 0:
        return 0
    prev = np.vstack([np.zeros((1, bits.shape[1]), dtype=bits.dtype), bits[:-1]])
    return limit_events(prev, bits)


def summarize(header: dict[str, Any], rec: np.ndarray) -> dict[str, Any]:
    """Key figures of a recording: duration, ticks, time in each mode and health state, ranges."""
    n_rec = len(rec)
    out: dict[str, Any] = {"arm": header["arm"], "source": header["source"], "records": n_rec,
                           "tick_hz": header["tick_hz"]}
    if n_rec == 0:
        out["duration_s"] = 0.0
        return out
    t = rec["t"]
    dt = 1.0 / header["tick_hz"]
    ticks = rec["tick"].astype(np.int64)
    out["duration_s"] = float(t[-1] - t[0]) + dt
    out["ticks"] = int(ticks[-1] - ticks[0] + 1)
    out["missing_ticks"] = int(out["ticks"] - n_rec)
    out["time_in_mode_s"] = {m: float(np.count_nonzero(rec["mode"] == i) * dt)
                             for i, m in enumerate(header["modes"]) if np.any(rec["mode"] == i)}
    out["time_in_health_s"] = {s: float(np.count_nonzero(rec["health"] == i) * dt)
                               for i, s in enumerate(header["health_states"]) if np.any(rec["health"] == i)}
    q, qd = rec["q"], rec["qd"]
    out["q_min"] = q.min(axis=0).tolist()
    out["q_max"] = q.max(axis=0).tolist()
    out["qd_abs_max"] = np.abs(qd).max(axis=0).tolist()

    def finite_min_max(name: str) -> tuple[float | None, float | None]:
        v = rec[name].astype(float)
        v = v[np.isfinite(v)]
        return (float(v.min()), float(v.max())) if v.size else (None, None)

    for name in ("scale", "cap", "damping", "sigma_min", "manipulability"):
        lo, hi = finite_min_max(name)
        out[f"{name}_min"], out[f"{name}_max"] = lo, hi
    lin = rec["twist_achieved"][:, :3].astype(float)
    speeds = np.linalg.norm(lin, axis=1)
    speeds = speeds[np.isfinite(speeds)]
    out["tool_speed_max"] = float(speeds.max()) if speeds.size else None
    out["limit_events"] = _rising_edges(rec["limits"])
    return out


def format_summary(s: dict[str, Any], joints: list[str]) -> str:
    """Readable text of `summarize`'s result."""
    def num(v: float | None, fmt: str = ".4g") -> str:
        return "n/a" if v is None else format(v, fmt)

    lines = [f"recording of {s['arm']} ({s['source']}): {s['records']} records, "
             f"{num(s.get('duration_s'), '.3f')} s at {s['tick_hz']:g} Hz"]
    if not s["records"]:
        return "\n".join(lines)
    lines.append(f"  ticks {s['ticks']} (missing {s['missing_ticks']})")
    lines.append("  time in mode:   " + ", ".join(f"{k} {v:.2f} s" for k, v in s["time_in_mode_s"].items()))
    lines.append("  time in health: " + ", ".join(f"{k} {v:.2f} s" for k, v in s["time_in_health_s"].items()))
    lines.append(f"  scale min {num(s['scale_min'])}, speed-cap factor min {num(s['cap_min'])}, damping max "
                 f"{num(s['damping_max'])} m")
    lines.append(f"  smallest singular value min {num(s['sigma_min_min'])} m, manipulability min "
                 f"{num(s['manipulability_min'])}, max {num(s['manipulability_max'])}")
    lines.append(f"  tool speed max {num(s['tool_speed_max'])} m/s, limit events {s['limit_events']}")
    lines.append("  joint          q min      q max    |qd| max")
    for i, name in enumerate(joints):
        lines.append(f"  {name:<12} {s['q_min'][i]:>8.4f} {s['q_max'][i]:>10.4f} {s['qd_abs_max'][i]:>10.4f}")
    return "\n".join(lines)


# the plot lives in its own module; re-exported where callers look for it
from twistrate.service.recording_plot import plot_svg as plot_svg  # noqa: E402
