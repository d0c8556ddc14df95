"""Make sure the browser tests have their browser: Debian's chromium at /usr/bin/chromium.

    python3 tests/setup_browser.py        (idempotent: does nothing when chromium is there)

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
PACKAGES = ["chromium", "tmux"]  # tmux: the terminal monitor's test in a terminal multiplexer


def main() -> int:
    missing = [
        p
        for p, path in (("chromium", CHROMIUM), ("tmux", shutil.which("tmux") or "/nonexistent"))
        if not os.path.exists(path)
    ]
    if not missing:
        print(f"setup_browser: {CHROMIUM} and tmux present")
        return 0
    if os.geteuid() != 0 or shutil.which("apt-get") is None:
        print(
            f"setup_browser: missing {', '.join(missing)}; install the Debian packages as root: "
            f"apt-get install -y {' '.join(missing)} (the browser and tmux tests skip until then)"
        )
        return 0
    env = {**os.environ, "DEBIAN_FRONTEND": "noninteractive"}
    subprocess.run(["apt-get", "update", "-q"], check=True, env=env)
    subprocess.run(["apt-get", "install", "-y", "-q", *missing], check=True, env=env)
    print(f"setup_browser: installed {', '.join(missing)}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
