"""Refresh the real outputs quoted in README.md (between marker comments).

    python tools/update_readme.py

Runs ``passby analyze recordings_demo --temperature 8`` and
``passby report recordings_demo/tollowmere_lane_morning.sqlite --limit 50`` and
puts their output between the ``demo`` and ``report`` markers, so the
README shows what the program prints, not what someone typed.
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


def passby(*args) -> str:
    return subprocess.run([sys.executable, "-m", "passby", *args], cwd=ROOT, capture_output=True,
                          text=True, check=True).stdout


def main() -> int:
    readme = ROOT / "README.md"
    text = readme.read_text()
    demo = passby("analyze", "recordings_demo", "--temperature", "8")
    text = replace_between(text, "demo", f"```\n{demo.rstrip()}\n```")
    report = passby("report", "recordings_demo/tollowmere_lane_morning.sqlite", "--limit", "50")
    cmd = "$ passby report recordings_demo/tollowmere_lane_morning.sqlite --limit 50"
    text = replace_between(text, "report", f"```\n{cmd}\n{report.rstrip()}\n```")
    readme.write_text(text)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
