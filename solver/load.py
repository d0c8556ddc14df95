"""Load an arm description file (.toml or .urdf, by path or packaged example name) into an `Arm`.

This module is the one I/O edge of twistrate.solver: it reads the file and hands the text to the
pure parsers (`arm_toml.parse_arm_toml`, `urdf.parse_urdf`). Packaged example arms live in the
package `twistrate.configs.arms` and are found with importlib.resources, so a short name such as
"bench6" works as well as a path.
"""

from __future__ import annotations

from collections.abc import Mapping
from importlib import resources
from pathlib import Path

from twistrate.solver.arm import Arm
from twistrate.solver.arm_toml import parse_arm_toml
from twistrate.solver.errors import InputError, field_error
from twistrate.solver.urdf import parse_urdf

#: Package holding the invented example arms.
EXAMPLES_PACKAGE = "twistrate.configs.arms"
#: File extensions load_arm reads, in the order a short name is tried.
SUFFIXES = (".toml", ".urdf")


def example_arms() -> dict[str, str]:
    """{short name: file name} of the packaged example arms, e.g. {"bench6": "bench6.toml"}."""
    found = {}
    for entry in resources.files(EXAMPLES_PACKAGE).iterdir():
        suffix = Path(entry.name).suffix
        if suffix in SUFFIXES and entry.is_file():
            found[Path(entry.name).stem] = entry.name
    return dict(sorted(found.items()))


def read_arm_source(name_or_path: str | Path) -> tuple[bytes, str, str]:
    """Find and read an arm file: an existing path, else a packaged example by short or file name.

    Returns (content bytes, label for messages, suffix ".toml" or ".urdf").
    Raises InputError naming the argument when nothing is found or the suffix is unknown.
    """
    path = Path(name_or_path)
    if path.is_file():
        try:
            data, label = path.read_bytes(), str(path)
        except OSError as exc:
            raise field_error(InputError, "arm file", str(path),
                              f"a readable file ({exc.strerror})") from None
    else:
        examples = example_arms()
        stem = path.stem if path.suffix in SUFFIXES and path.name in examples.values() else path.name
        if str(name_or_path) != path.name or stem not in examples:
            raise field_error(InputError, "arm file", str(name_or_path),
                              f"an existing .toml/.urdf file or an example name ({', '.join(examples)})")
        entry = resources.files(EXAMPLES_PACKAGE).joinpath(examples[stem])
        data, label, path = entry.read_bytes(), examples[stem], Path(examples[stem])
    if path.suffix.lower() not in SUFFIXES:
        raise field_error(InputError, "arm file", str(name_or_path), "a file ending in .toml or .urdf")
    return data, label, path.suffix.lower()


def parse_arm_source(
    data: bytes,
    label: str,
    suffix: str,
    base_link: str | None = None,
    tool_link: str | None = None,
    acceleration: float | Mapping[str, float] | None = None,
) -> Arm:
    """Parse content already read by `read_arm_source` with the parser for its suffix (no I/O).

    base_link, tool_link, acceleration : URDF only (see `twistrate.solver.urdf.parse_urdf`); giving
        them for a TOML arm is an InputError.
    """
    if suffix == ".urdf":
        return parse_urdf(data, base_link, tool_link, acceleration, source=label)
    for key, value in (("base_link", base_link), ("tool_link", tool_link), ("acceleration", acceleration)):
        if value is not None:
            raise field_error(InputError, key, value,
                              "only for .urdf files (a TOML arm states its own chain)")
    return parse_arm_toml(data, source=label)


def load_arm(
    name_or_path: str | Path,
    base_link: str | None = None,
    tool_link: str | None = None,
    acceleration: float | Mapping[str, float] | None = None,
) -> Arm:
    """Load an arm from a .toml or .urdf file path or a packaged example name.

    base_link, tool_link, acceleration : URDF only (see `twistrate.solver.urdf.parse_urdf`).
    Raises InputError (file not found, wrong suffix, URDF-only argument) or ModelError (content).
    """
    return parse_arm_source(*read_arm_source(name_or_path), base_link, tool_link, acceleration)
