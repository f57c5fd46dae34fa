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


def _readme_commands():
    """Every ``thinning …`` command the README shows: code-block lines and inline code."""
    import shlex

    found = []
    for block in re.findall(r"```sh\n(.*?)```", README, re.S):
        for line in block.splitlines():
            line = line.split("  #")[0].strip()
            if line.startswith("thinning "):
                found.append(shlex.split(line))
    found += [shlex.split(m) for m in re.findall(r"`(thinning [^`…]+)`", README)]
    return found


def _resolve(tokens):
    """The click command named by ``tokens`` (``thinning records lots …``) and its options."""
    import click

    from thinning.cli import cli

    command, rest = cli, tokens[1:]
    with click.Context(cli) as ctx:
        while isinstance(command, click.Group) and rest and not rest[0].startswith("-"):
            command = command.get_command(ctx, rest[0])
            assert command is not None, f"no command {rest[0]!r} in {' '.join(tokens)}"
            rest = rest[1:]
    options = {name for p in command.params if isinstance(p, click.Option)
               for name in (*p.opts, *p.secondary_opts)}
    return command, options, rest


def test_every_readme_command_and_option_exists():
    commands = _readme_commands()
    assert len(commands) >= 15
    for tokens in commands:
        _, options, rest = _resolve(tokens)
        for token in rest:
            if token.startswith("--"):
                assert token.split("=")[0] in options, f"{' '.join(tokens)}: {token} is no option"


def test_the_readme_option_table_is_the_analyse_command():
    section = README.split("### One recording", 1)[1].split("\n### ", 1)[0]
    table = set(re.findall(r"^\| `(--[a-z-]+)` \|", section, re.M))
    _, options, _ = _resolve(["thinning", "analyse"])
    assert table == options - {"--out", "-h", "--help"}
