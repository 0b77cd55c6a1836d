"""Re-run the README's `streamcond circuit` worked examples and paste their output.

    python tools/circuit_readme.py      # from the repository's root

Each block after a ``<!-- circuit-example -->`` marker is a ``$ command`` line and the output
it printed; tests/test_circuit_cli.py checks they still agree. When a change elsewhere (the
noise estimate, tune's suggestion) moves the figures, run this and review the diff.
"""

from __future__ import annotations

import re
import shlex
import subprocess
from pathlib import Path

README = Path(__file__).resolve().parents[1] / "README.md"
BLOCK = re.compile(r"(<!-- circuit-example -->\s*```console\n\$ (.+?)\n)(.*?)(```)", re.S)


def main() -> None:
    text = README.read_text(encoding="utf-8")

    def rerun(m: re.Match[str]) -> str:
        argv = shlex.split(m.group(2))
        out = subprocess.run(argv, capture_output=True, text=True, check=True,
                             cwd=README.parent).stdout
        return m.group(1) + out + m.group(4)

    README.write_text(BLOCK.sub(rerun, text), encoding="utf-8")


if __name__ == "__main__":
    main()
