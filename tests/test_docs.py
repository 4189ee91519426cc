"""The README stays true: field tables from the parameter table, CI runs its test command."""

from __future__ import annotations

import subprocess
from pathlib import Path

from voicer.tone.params import fields_markdown

ROOT = Path(__file__).resolve().parent.parent
README = (ROOT / "README.md").read_text()


def test_readme_field_tables_match_the_parameter_table() -> None:
    block = README.split("<!-- fields:start -->\n", 1)[1].split("<!-- fields:end -->", 1)[0]
    assert block == fields_markdown(), "run: python scripts/update_readme_fields.py"


def test_ci_runs_the_readme_test_command() -> None:
    # .ci/run prints the command it extracted before running it; extract it the same way.
    script = (ROOT / ".ci" / "run").read_text()
    awk = script.split("cmd=$(", 1)[1].split(" README.md)", 1)[0]
    cmd = subprocess.run(["bash", "-c", awk + " README.md"], cwd=ROOT, capture_output=True, text=True,
                         check=True).stdout.strip()
    assert cmd == "python3 -m venv .venv && .venv/bin/pip install -e '.[test]' && .venv/bin/python -m pytest"
    assert f"```sh\n{cmd}\n```" in README


def test_readme_opens_with_the_job_and_the_two_commands() -> None:
    first = README.split("\n\n")[1]
    assert first.startswith("voicer is for piano technicians")
    assert "```sh\npython3 -m venv .venv && .venv/bin/pip install . && .venv/bin/voicer demo\n```" in README
