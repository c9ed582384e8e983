"""Refresh the generated parts of README.md from the registries.

    python -m fleetwatch._docs README.md

Replaces the text between ``<!-- NAME:begin -->`` and ``<!-- NAME:end -->`` markers for
NAME in (settings, tables). Tests check that every setting, table and column is documented.
"""
from __future__ import annotations

import re
import sys
from pathlib import Path

from .config import settings_table_markdown
from .schema import tables_markdown

SECTIONS = {"settings": settings_table_markdown, "tables": tables_markdown}


def refresh(text: str) -> str:
    for name, fn in SECTIONS.items():
        pat = re.compile(rf"(<!-- {name}:begin -->\n).*?(<!-- {name}:end -->)", re.S)
        text = pat.sub(lambda m: m.group(1) + fn() + "\n" + m.group(2), text)
    return text


if __name__ == "__main__":
    path = Path(sys.argv[1] if len(sys.argv) > 1 else "README.md")
    path.write_text(refresh(path.read_text(encoding="utf-8")), encoding="utf-8")
