"""Where a running service listens: the endpoints file `twistrate serve --endpoints-file FILE` writes once
its three sockets are bound (a configured port * becomes the port the operating system picked).

The file is one JSON object {"intake": ..., "output": ..., "control": ..., "pid": ...}, written to a
temporary name and renamed, so a reader never sees half of it. Drivers, clients and tests read it
instead of guessing a free port (which races with every other program on the machine).
"""

from __future__ import annotations

import json
import os
import time
from collections.abc import Mapping
from pathlib import Path

from twistrate.solver.errors import ConfigError, field_error

#: the socket names the file carries (docs/protocol.md section 1)
SOCKET_NAMES = ("intake", "output", "control")
#: how often a reader looks for the file while it waits, s
POLL_S = 0.02


def write_endpoints(path: str | Path, endpoints: Mapping[str, str]) -> Path:
    """Write the bound endpoints (and this process's id) to `path` atomically."""
    path = Path(path)
    doc = {name: endpoints[name] for name in SOCKET_NAMES}
    doc["pid"] = os.getpid()
    tmp = path.with_name(f".{path.name}.{os.getpid()}.tmp")
    tmp.write_text(json.dumps(doc) + "\n", encoding="utf-8")
    os.replace(tmp, path)
    return path


def read_endpoints(path: str | Path, wait_s: float = 0.0) -> dict[str, str]:
    """The endpoints in `path`, waiting up to wait_s seconds for the file to appear. Raises ConfigError
    naming the file when it is absent after that, unreadable, or not an endpoints file."""
    path = Path(path)
    deadline = time.monotonic() + wait_s
    while True:
        try:
            doc = json.loads(path.read_text(encoding="utf-8"))
            break
        except FileNotFoundError:
            if time.monotonic() >= deadline:
                raise field_error(ConfigError, "endpoints file", str(path),
                                  f"a file written by `twistrate serve --endpoints-file` (none after "
                                  f"{wait_s:g} s: is the service running?)") from None
            time.sleep(POLL_S)
        except (OSError, ValueError) as exc:
            raise field_error(ConfigError, "endpoints file", str(path),
                              f"a readable JSON file ({exc})") from None
    if not isinstance(doc, dict) or not all(isinstance(doc.get(k), str) for k in SOCKET_NAMES):
        raise field_error(ConfigError, "endpoints file", str(path),
                          f"a JSON object with the string fields {', '.join(SOCKET_NAMES)}")
    return {name: doc[name] for name in SOCKET_NAMES}
