"""The README says what the tool does: its warnings table is the finding registry."""

import re
from pathlib import Path

from thinning.checks import Code

README = (Path(__file__).resolve().parent.parent / "README.md").read_text(encoding="utf-8")


def _warning_table():
    section = README.split("### Warnings", 1)[1].split("\n## ", 1)[0]
    rows = {}
    for line in section.splitlines():
        cells = [c.strip() for c in line.strip().strip("|").split("|")]
        if len(cells) == 3 and cells[0].startswith("`"):
            rows[cells[0].strip("`")] = (cells[1], cells[2])
    return rows


def test_the_readme_warning_table_is_the_registry():
    table = _warning_table()
    assert set(table) == {c.value for c in Code}
    for code in Code:
        meaning, doubtful = table[code.value]
        assert doubtful == code.doubtful, code
        assert meaning == code.meaning, code


def test_every_registered_code_is_raised_somewhere():
    # a registered check that no stage raises is dead: each code is named by its member
    source = "\n".join(p.read_text(encoding="utf-8")
                       for p in (Path(__file__).resolve().parent.parent / "thinning").rglob("*.py")
                       if p.name != "checks.py")
    unused = [c.name for c in Code if not re.search(rf"\bCode\.{c.name}\b", source)]
    assert not unused
