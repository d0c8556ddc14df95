"""Make sure the tests have the system programs they drive: Debian's chromium at /usr/bin/chromium
(the browser tests), tmux (the terminal monitor's test) and Node.js (the second-language client,
tests/js/).

    python3 tests/setup_browser.py        (idempotent: does nothing when all are there)

Installs the Debian package with apt-get when it is missing and this runs as root (CI does); otherwise
says what to install and exits 0, so the browser tests skip with the same message. Playwright drives
this system browser (executable_path); it never downloads a browser of its own.
"""

from __future__ import annotations

import os
import shutil
import subprocess
import sys

CHROMIUM = "/usr/bin/chromium"
#: Debian package -> the program it installs (tmux: the terminal monitor's test in a terminal
#: multiplexer; nodejs: the JavaScript client written from docs/protocol.md).
PACKAGES = {"chromium": CHROMIUM, "tmux": "tmux", "nodejs": "node"}


def _present(path: str) -> bool:
    return os.path.exists(path) if path.startswith("/") else shutil.which(path) is not None


def main() -> int:
    missing = [package for package, path in PACKAGES.items() if not _present(path)]
    if not missing:
        print(f"setup_browser: {', '.join(PACKAGES)} present")
        return 0
    if os.geteuid() != 0 or shutil.which("apt-get") is None:
        print(
            f"setup_browser: missing {', '.join(missing)}; install the Debian packages as root: "
            f"apt-get install -y {' '.join(missing)} (the tests that need them skip until then)"
        )
        return 0
    env = {**os.environ, "DEBIAN_FRONTEND": "noninteractive"}
    subprocess.run(["apt-get", "update", "-q"], check=True, env=env)
    subprocess.run(["apt-get", "install", "-y", "-q", *missing], check=True, env=env)
    print(f"setup_browser: installed {', '.join(missing)}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
