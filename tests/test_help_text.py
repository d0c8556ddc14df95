"""`--help` of every `twistrate` command and every `twistrate bench` benchmark: the description is whole
(common practice for command-line help: the summary is a complete sentence, not a line cut where the
module docstring happens to wrap), and `twistrate bench --help` lists every benchmark."""

from __future__ import annotations

import importlib
import re
from pathlib import Path

import pytest

from twistrate.service.bench.cli import BENCHMARKS
from twistrate.service.bench.cli import main as bench_main
from twistrate.service.commands.cli import COMMANDS, module_of
from twistrate.service.commands.help_text import first_paragraph

#: commands whose --help needs an optional extra
_EXTRAS = {"watch": "rich", "dashboard": "aiohttp", "plot": "matplotlib"}


def _description(text: str) -> str:
    """The description paragraph of argparse's help: the paragraph after the usage, before the options."""
    paragraphs = [p for p in re.split(r"\n\s*\n", text.strip()) if p.strip()]
    assert paragraphs[0].startswith("usage:"), text
    return " ".join(paragraphs[1].split())


def _help_of(run, capsys) -> str:
    """run(["--help"])'s output; it exits 0 (argparse) or returns 0 (a command that catches the exit)."""
    try:
        code = run(["--help"])
    except SystemExit as exc:
        code = exc.code
    assert code in (0, None)
    return capsys.readouterr().out


@pytest.mark.parametrize("name", sorted(BENCHMARKS))
def test_bench_help_description_is_a_whole_sentence(name, capsys):
    module = importlib.import_module(BENCHMARKS[name][0])
    text = _help_of(module.run, capsys)
    desc = _description(text)
    assert desc.endswith("."), desc
    if "first_paragraph(__doc__)" in Path(module.__file__).read_text():
        assert desc == " ".join(first_paragraph(module.__doc__).split())


@pytest.mark.parametrize("name", sorted(c for c in COMMANDS if c != "bench"))
def test_command_help_description_is_a_whole_sentence(name, capsys):
    if name in _EXTRAS:
        pytest.importorskip(_EXTRAS[name])
    module = importlib.import_module(module_of(name))
    text = _help_of(module.main, capsys)
    desc = _description(text)
    assert desc.endswith("."), desc


def test_bench_lists_every_benchmark(capsys):
    assert bench_main(["--help"]) == 0
    out = capsys.readouterr().out
    for name in BENCHMARKS:
        assert re.search(rf"^  {name}\s", out, re.M), name


def test_first_paragraph_joins_the_wrapped_lines_of_the_first_paragraph():
    doc = "`x`: the first sentence runs\nover two lines.\n\nDetails.\n"
    assert first_paragraph(doc) == "`x`: the first sentence runs over two lines."
    assert first_paragraph(None) == "" and first_paragraph("one line") == "one line"
