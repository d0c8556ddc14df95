"""`twistrate bench`: the project's benchmarks, each in its own module with run(argv) -> int."""

from __future__ import annotations

import importlib
import sys

#: benchmark name -> (module with run(argv) -> int, one-line help)
BENCHMARKS: dict[str, tuple[str, str]] = {
    "solver": ("twistrate.service.bench.solver", "per-tick cost of rate resolution on the example arms"),
    "service": ("twistrate.service.bench.service", "tick timing, latencies and CPU of a running service"),
    "limits": ("twistrate.service.bench.limits", "every rate bound checked under random use of the solver"),
    "keepout": ("twistrate.service.bench.keepout", "cost of the keep-out pass against the free tick"),
    "vservo": ("twistrate.service.bench.vservo", "camera loop: features message to the command answering it"),
    "teleop": ("twistrate.service.bench.teleop", "device event to command published through teleop"),
    "soak": ("twistrate.service.bench.soak", "long run at the tick rate: memory growth, overruns, counters"),
    "dashboard": ("twistrate.service.bench.dashboard", "the dashboard's CPU with many arms and pages"),
}


def main(argv: list[str] | None = None) -> int:
    args = list(sys.argv[1:] if argv is None else argv)
    if not args or args[0] in ("-h", "--help", "help"):
        print("usage: twistrate bench NAME [options]   (twistrate bench NAME --help for each)\n")
        print("\n".join(f"  {name:<8} {text}" for name, (_, text) in BENCHMARKS.items()))
        return 0
    which, rest = args[0], args[1:]
    if which not in BENCHMARKS:
        print(f"twistrate bench: unknown benchmark {which!r}; accepted: {', '.join(BENCHMARKS)}",
              file=sys.stderr)
        return 2
    return int(importlib.import_module(BENCHMARKS[which][0]).run(rest))


if __name__ == "__main__":
    raise SystemExit(main())
