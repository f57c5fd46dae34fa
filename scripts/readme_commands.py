"""Print one of the README's two quick-start commands (``demo`` or ``test``).

The quick start is the first fenced ``sh`` block after the heading "Quick start":
its first line runs the demo, its second the tests. CI and the quick-start test
read the commands from here, so the README cannot drift from what is checked.
"""

import re
import sys
from pathlib import Path

README = Path(__file__).resolve().parent.parent / "README.md"


def quick_start_commands(text: str) -> list[str]:
    """The command lines of the quick-start block, in order."""
    section = text.split("## Quick start", 1)[1]
    block = re.search(r"```sh\n(.*?)```", section, re.S).group(1)
    return [line.strip() for line in block.splitlines() if line.strip() and not line.startswith("#")]


if __name__ == "__main__":
    which = sys.argv[1] if len(sys.argv) > 1 else "test"
    commands = quick_start_commands(README.read_text(encoding="utf-8"))
    print(commands[{"demo": 0, "test": 1}[which]])
