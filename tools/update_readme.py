"""Refresh the real outputs quoted in README.md (between marker comments).

    python tools/update_readme.py

Runs ``passby analyze recordings_demo --temperature 8`` and puts its output
between ``<!-- demo:begin -->`` and ``<!-- demo:end -->``, so the README
shows what the program prints, not what someone typed.
"""

import pathlib
import re
import subprocess
import sys

ROOT = pathlib.Path(__file__).resolve().parents[1]


def replace_between(text: str, name: str, body: str) -> str:
    pattern = re.compile(rf"(<!-- {name}:begin -->\n)(.*?)(<!-- {name}:end -->)", re.S)
    if not pattern.search(text):
        raise SystemExit(f"README.md has no {name} markers")
    return pattern.sub(lambda m: m.group(1) + body.rstrip("\n") + "\n" + m.group(3), text)


def main() -> int:
    out = subprocess.run([sys.executable, "-m", "passby", "analyze", "recordings_demo", "--temperature", "8"],
                         cwd=ROOT, capture_output=True, text=True, check=True).stdout
    readme = ROOT / "README.md"
    readme.write_text(replace_between(readme.read_text(), "demo", out))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
