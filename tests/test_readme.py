"""The README stays true: its test command is what CI runs, its commands exist, its links resolve."""

from __future__ import annotations

import re
from pathlib import Path

from twistrate.service.commands.cli import COMMANDS

ROOT = Path(__file__).resolve().parents[1]
README = (ROOT / "README.md").read_text()


def _setup_commands() -> list[str]:
    block = README.split("## Set-up: two commands", 1)[1].split("```sh", 1)[1].split("```", 1)[0]
    return [line.strip() for line in block.splitlines() if line.strip() and not line.startswith("#")]


def test_ci_runs_exactly_the_readme_test_command() -> None:
    demo, test = _setup_commands()
    assert demo.endswith("twistrate demo")
    ci_lines = [line.strip() for line in (ROOT / ".ci/run").read_text().splitlines()]
    assert test in ci_lines


def test_every_command_the_readme_names_exists() -> None:
    named = set(re.findall(r"twistrate (\w+)", README))
    named -= {"is", "process", "service", "solver"}  # prose ("twistrate is that process", ...)
    assert named, "no commands found"
    assert named <= set(COMMANDS), f"README names unknown commands: {named - set(COMMANDS)}"


def test_every_relative_link_resolves() -> None:
    links = re.findall(r"\]\(([^)#]+)\)", README)
    assert links
    for link in links:
        if "://" not in link:
            assert (ROOT / link).exists(), f"README links to missing {link}"


def test_the_cautions_are_there() -> None:
    # The usual cautions for software that moves machines (common practice; ISO 10218-1/-2, ISO 12100).
    text = README.lower()
    for phrase in ("not a safety-rated function", "emergency stop", "enabling device",
                   "risk assessment", "simulation", "reduced speed", "local codes"):
        assert phrase in text, phrase
