"""The README, the job schema, the CLI and CI stay in step (a drift test)."""

import re
from pathlib import Path

import pytest

from render.cli import EXIT_CODES, build_parser
from render.job import SCHEMA

ROOT = Path(__file__).resolve().parent.parent
README = (ROOT / "README.md").read_text(encoding="utf-8")


def _readme_keys():
    block = README.split("<!-- keys:start -->")[1].split("<!-- keys:end -->")[0]
    rows = re.findall(r"^\| `([^`]+)` \| (.+) \|$", block, flags=re.M)
    return dict(rows)


def _schema_keys():
    out = {}
    for section, keys in SCHEMA.items():
        for key, text in keys.items():
            out[f"{section}.{key}"] = text
    return out


def test_readme_key_table_equals_the_schema():
    assert _readme_keys() == _schema_keys()


def test_readme_quick_start_is_two_commands_and_ci_runs_the_test_one_verbatim():
    quick = README.split("## Quick start")[1].split("\n## ")[0]
    commands = re.findall(r"```sh\n(.+?)\n```", quick, flags=re.S)
    assert len(commands) == 2
    assert "render run jobs/demo.toml" in commands[0]
    ci = (ROOT / ".ci" / "run").read_text(encoding="utf-8")
    assert commands[1] in ci.splitlines()


def _subcommands():
    parser = build_parser()
    action = next(a for a in parser._actions if a.__class__.__name__ == "_SubParsersAction")
    return action.choices


@pytest.mark.parametrize("name", sorted(_subcommands()))
def test_every_command_and_option_is_in_the_readme(name):
    assert f"`render {name}" in README
    row = next(line for line in README.splitlines() if line.startswith(f"| `render {name}"))
    for action in _subcommands()[name]._actions:
        for opt in action.option_strings:
            if opt.startswith("--") and opt != "--help":
                assert opt in row, f"{opt} of render {name} is missing from the README's command table"


def test_exit_codes_are_documented():
    table = README.split("Exit codes:")[1].split("\n## ")[0]
    for meaning, code in EXIT_CODES.items():
        assert re.search(rf"^\| {code} \| {re.escape(meaning)} \|$", table, flags=re.M), meaning
