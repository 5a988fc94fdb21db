"""Regenerate docs/cli.md from the argument parsers: COLUMNS=100 python docs/gen_cli.py > docs/cli.md"""
import argparse
from agent.cli import build_parser, COMMAND_MODULES
p = build_parser()
out = ["# The `lethe` command", "",
"One command, `lethe`, with a subcommand per task. Every reporting command takes",
"`--json`. The home is `--home DIR`, else `$LETHE_HOME`, else the per-user data",
"directory (docs/home.md). This page is generated from the parsers",
"(`docs/gen_cli.py`; `lethe COMMAND --help` prints the same);",
"a test checks that every command is listed here.", "",
"## Exit codes", "",
"| code | meaning |", "| --- | --- |",
"| 0 | success |", "| 1 | a check ran and failed (a limits rule, a retention violation) |",
"| 2 | usage error (bad command line) |", "| 3 | bad input data (policy, raw file, answers, card, enrolment) |",
"| 4 | integrity failure: signature, MAC, hash chain or AEAD tag (tampering or corruption) |",
"| 5 | wrong state (not enrolled, locked by another agent, unenrolled device, replay) |",
"| 6 | the privacy budget or disclosure control refuses an export |", "",
"## Commands", ""]
def walk(parser, prefix):
    for a in parser._actions:
        if isinstance(a, argparse._SubParsersAction):
            helps = {c.dest: c.help for c in a._choices_actions}
            for name, sp in a.choices.items():
                full = f"{prefix} {name}"
                if not any(isinstance(x, argparse._SubParsersAction) for x in sp._actions):
                    out.append(f"### `{full}`\n")
                    out.append((helps.get(name) or "").rstrip(".") + ".\n" if helps.get(name) else "")
                    if sp.description and sp.description != helps.get(name):
                        out.append(sp.description + "\n")
                    out.append("```\n" + sp.format_help().strip() + "\n```\n")
                walk(sp, full)
walk(p, "lethe")
print("\n".join(out))
