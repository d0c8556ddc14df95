"""The `twistrate` console script: parses the subcommand and hands off to its module's main()."""

from __future__ import annotations

import importlib
import sys

#: subcommand -> (module under twistrate.service, one-line help). Each module has main(argv) -> int.
COMMANDS: dict[str, tuple[str, str]] = {
    "arm": ("twistrate.service.arm_cmd", "load an arm file and report kinematics and health"),
    "serve": ("twistrate.service.serve", "run the streaming service for one arm"),
    "sim": ("twistrate.service.sim_cmd", "run the built-in simulated arm as a driver process"),
    "demo": ("twistrate.service.demo", "service + simulated arm + scripted twist source, no hardware"),
    "record": ("twistrate.service.record_cmd", "record a running service, or summarise a recording"),
    "keys": ("twistrate.service.keys_cmd", "make CURVE key pairs for non-loopback endpoints"),
    "bench": ("twistrate.service.bench", "benchmarks: `bench solver`, `bench service`"),
}


def usage() -> str:
    lines = ["usage: twistrate COMMAND [options]   (twistrate COMMAND --help for each)", ""]
    lines += [f"  {name:<8} {text}" for name, (_, text) in COMMANDS.items()]
    return "\n".join(lines)


def main(argv: list[str] | None = None) -> int:
    args = sys.argv[1:] if argv is None else list(argv)
    if not args or args[0] in ("-h", "--help", "help"):
        print(usage())
        return 0
    name, rest = args[0], args[1:]
    if name not in COMMANDS:
        print(f"twistrate: unknown command {name!r}; accepted: {', '.join(COMMANDS)}", file=sys.stderr)
        return 2
    module = importlib.import_module(COMMANDS[name][0])
    return int(module.main(rest))


if __name__ == "__main__":
    raise SystemExit(main())
