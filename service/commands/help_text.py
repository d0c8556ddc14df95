"""The description a command's --help prints: the first paragraph of its module's docstring, whole."""

from __future__ import annotations


def first_paragraph(doc: str | None) -> str:
    """The text up to the first blank line of `doc`, its lines joined by single spaces ("" for None).

    A module docstring's first sentence often runs over two lines; its first line alone would end the
    description mid-sentence.
    """
    lines: list[str] = []
    for line in (doc or "").strip().splitlines():
        if not line.strip():
            break
        lines.append(line.strip())
    return " ".join(lines)
