#!/usr/bin/env python3
"""Prints the README's command reference (Markdown) from the programs' own
--help, for pasting into README.md after options change:

    python3 tests/support/make_command_reference.py build > /tmp/commands.md

The test `the README's command reference matches every --help`
(tests/integration/client_commands_test.cpp) then checks that each
command's options in the README are exactly those its --help lists."""
import re
import subprocess
import sys

build = sys.argv[1] if len(sys.argv) > 1 else "build"
slopecast = f"{build}/client/cli/slopecast"
slopecastd = f"{build}/daemon/app/slopecastd"


def options(text):
    """(names, meaning) per option of a CLI11 --help text."""
    out = []
    lines = text.split("\n")
    in_options = False
    for i, line in enumerate(lines):
        if line.startswith("Options:"):
            in_options = True
            continue
        if in_options and (line.startswith("Subcommands:") or (line and not line.startswith(" "))):
            break
        m = re.match(r"^  (-\S+)(.*)$", line) if in_options else None
        if not m:
            continue
        names = [n for n in m.group(1).split(",") if n.startswith("--")]
        if not names or names == ["--help"]:
            continue
        rest = m.group(2)
        same_line = (re.match(r"^\s{2,}(.*)$", rest) or re.match(r"^ \S+(?: \S+)*?\s{2,}(.*)$", rest)
                     or re.match(r"^ \S+ (.+)$", rest))
        meaning = same_line.group(1) if same_line else ""
        if not meaning and i + 1 < len(lines) and lines[i + 1].startswith("   "):
            meaning = lines[i + 1].strip()
        out.append((names[0], meaning.replace("|", "/")))
    return out


def section(title, help_text):
    first = help_text.split("\n")[0].strip()
    print(f"### `{title}`\n\n{first}\n\n| option | meaning |\n|---|---|")
    for name, meaning in options(help_text):
        print(f"| `{name}` | {meaning} |")
    print()


top = subprocess.run([slopecast, "--help"], capture_output=True, text=True).stdout
commands = re.findall(r"^  (\w+)\s{2,}", top.split("Subcommands:")[1], re.M)
section("slopecastd", subprocess.run([slopecastd, "--help"], capture_output=True, text=True).stdout.split("\nConfig file (TOML).")[0])
for c in commands:
    section(f"slopecast {c}", subprocess.run([slopecast, c, "--help"], capture_output=True, text=True).stdout)
