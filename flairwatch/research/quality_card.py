"""The quality benchmark's Markdown: one section, replaced in place inside a model card.

The section lies between two HTML comment markers (invisible when the card is rendered);
a card without them gets the section appended at its end. Only the text between the markers
changes, so hand-written parts of the card stay as they are.
"""

from __future__ import annotations

import os
from collections.abc import Mapping, Sequence
from pathlib import Path

from flairwatch.research.quality_gate import Line, gate_table

START = "<!-- shift-suite quality: start (written by scripts/bench_quality.py) -->"
END = "<!-- shift-suite quality: end -->"


def replace_section(text: str, section: str) -> str:
    """``text`` with the part between the markers replaced by ``section`` (or appended)."""
    block = f"{START}\n{section.rstrip()}\n{END}"
    start, end = text.find(START), text.find(END)
    if start == -1 or end == -1 or end < start:
        return text.rstrip() + "\n\n" + block + "\n"
    return text[:start] + block + text[end + len(END) :]


def write_into(path: Path, section: str) -> None:
    """Replace (or append) the section in the file at ``path`` (created if missing), atomically."""
    old = path.read_text(encoding="utf-8") if path.is_file() else ""
    tmp = path.with_name(path.name + ".tmp")
    tmp.write_text(replace_section(old, section), encoding="utf-8")
    os.replace(tmp, path)


def section(
    *,
    title: str,
    facts: Sequence[str],
    lines: Sequence[Line],
    parts: Mapping[str, str],
    subsets: Mapping[str, str],
) -> str:
    """The benchmark section: caution, run facts, gate, subsets and the three tables."""
    out = [
        f"## {title}",
        "",
        "RESEARCH USE ONLY - NOT FOR DIAGNOSIS OR TREATMENT. Measured on synthetic series of the "
        "shift suite (built by code separate from the training generator, never trained on), not "
        "on patients; validate on your own scans.",
        "",
        *[f"- {f}" for f in facts],
        "",
        "### Gate (issue 9)",
        "",
        gate_table(lines),
        "### Subsets (each varies one thing beyond the training ranges)",
        "",
        *[f"- `{name}`: {what}" for name, what in subsets.items()],
        "",
        "### By subset",
        "",
        parts["by_subset"],
        "### By reference lesion load (mL)",
        "",
        parts["by_load_bin"],
        "### All series",
        "",
        parts["overall"],
    ]
    return "\n".join(out)
