"""The `twistrate` console script: parses the subcommand and hands off to its module's main()."""

from __future__ import annotations

import importlib
import importlib.metadata
import os
import sys

#: Package of the subcommand modules; each has main(argv) -> int.
PACKAGE = "twistrate.service.commands"
#: subcommand -> (module, one-line help); a module name without a dot is one of PACKAGE.
COMMANDS: dict[str, tuple[str, str]] = {
    "arm": ("arm", "load an arm file and report kinematics and health"),
    "serve": ("serve", "run the streaming service for one arm"),
    "sim": ("sim", "run the built-in simulated arm as a driver process"),
    "demo": ("demo", "service + simulated arm + scripted twist source, no hardware"),
    "record": ("record", "record a running service, or summarise a recording"),
    "keys": ("keys", "make CURVE key pairs for non-loopback endpoints"),
    "status": ("status", "one look at a running service: mode, lease, health, counters, tick timing"),
    "set": ("set", "change run-time tunables of a running service (NAME=VALUE ...)"),
    "check": ("check", "validate a service config and its arm without starting anything"),
    "vservo": ("vservo", "close a camera loop (visual servoing); --synthetic: on a simulated cell"),
    "teleop": ("teleop", "jog the arm from a six-axis hand controller or the keyboard"),
    "bench": ("twistrate.service.bench.cli",
              "the project's benchmarks (`twistrate bench --help` lists them)"),
    "plot": ("plot", "a figure of a recording (PNG, SVG)"),
    "watch": ("watch", "the arms in a terminal, a panel per arm (read-only)"),
    "dashboard": ("dashboard", "a web page watching one or more arms (read-only)"),
}


def module_of(command: str) -> str:
    """The full module name of a subcommand."""
    module = COMMANDS[command][0]
    return module if "." in module else f"{PACKAGE}.{module}"


def usage() -> str:
    lines = ["usage: twistrate COMMAND [options]   (twistrate COMMAND --help for each; twistrate --version)",
             ""]
    lines += [f"  {name:<8} {text}" for name, (_, text) in COMMANDS.items()]
    return "\n".join(lines)


def main(argv: list[str] | None = None) -> int:
    args = sys.argv[1:] if argv is None else list(argv)
    if not args or args[0] in ("-h", "--help", "help"):
        print(usage())
        return 0
    if args[0] in ("--version", "-V"):
        print(f"twistrate {version()}")
        return 0
    name, rest = args[0], args[1:]
    if name not in COMMANDS:
        print(f"twistrate: unknown command {name!r}; accepted: {', '.join(COMMANDS)}", file=sys.stderr)
        return 2
    try:
        code = int(importlib.import_module(module_of(name)).main(rest))
        sys.stdout.flush()
    except BrokenPipeError:  # the reader went away (`twistrate ... | head`): stop quietly
        devnull = os.open(os.devnull, os.O_WRONLY)
        os.dup2(devnull, sys.stdout.fileno())  # nothing left to flush at exit
        return EXIT_BROKEN_PIPE
    return code


#: Exit status after the output pipe closed early: 128 + SIGPIPE, as the shell reports such a program.
EXIT_BROKEN_PIPE = 141


def version() -> str:
    """The installed distribution's version (pyproject.toml)."""
    try:
        return importlib.metadata.version("twistrate")
    except importlib.metadata.PackageNotFoundError:
        return "unknown (not installed)"


if __name__ == "__main__":
    raise SystemExit(main())
