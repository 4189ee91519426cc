"""Rewrite the preset field tables in README.md from voicer.tone.params (one table, one truth).

Usage: python scripts/update_readme_fields.py
"""

from __future__ import annotations

import re
from pathlib import Path

from voicer.tone.params import fields_markdown

README = Path(__file__).resolve().parent.parent / "README.md"
START, END = "<!-- fields:start -->", "<!-- fields:end -->"


def main() -> None:
    text = README.read_text()
    block = f"{START}\n{fields_markdown()}{END}"
    new = re.sub(re.escape(START) + ".*?" + re.escape(END), lambda _: block, text, flags=re.S)
    README.write_text(new)
    print("README.md fields updated" if new != text else "README.md fields already up to date")


if __name__ == "__main__":
    main()
