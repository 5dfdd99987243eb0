"""One flag grammar across the commands (README, "Flags"): every option explains itself, shows its default and
its choices, and a flag name means one thing everywhere. The help text is read from argparse's own formatter
(Python standard library)."""

from __future__ import annotations

import argparse

import pytest
from shardmill.commands.cli import build_parser

GRAMMAR = {
    # flag: (kind of value, what it means) — the README's table
    "--set": "assignment",
    "--ranks": "count",
    "--sizes": "list",
    "--json": "switch",
    "--out": "file",
    "--out-dir": "folder",
    "--no-progress": "switch",
    "--threads": "count",
    "--steps": "count",
}


def _commands() -> dict[str, argparse.ArgumentParser]:
    parser = build_parser()
    sub = next(a for a in parser._actions if isinstance(a, argparse._SubParsersAction))
    return dict(sub.choices)


COMMANDS = _commands()


@pytest.mark.parametrize("name", sorted(COMMANDS))
def test_every_option_has_help_its_default_and_its_choices(name):
    command = COMMANDS[name]
    text = command.format_help()
    assert command.description, name
    for action in command._actions:
        if isinstance(action, argparse._HelpAction):
            continue
        assert action.help and len(action.help) > 10, (name, action.dest)
        flag = action.option_strings[0] if action.option_strings else action.metavar
        shown = action.default not in (None, False, argparse.SUPPRESS, []) and action.option_strings
        if shown:
            default = ",".join(map(str, action.default)) if isinstance(action.default, list) else str(action.default)
            # the default's own value must be in the help (the word "default" alone proved nothing)
            written = " ".join(action.help.split())
            assert f"default: {default}" in " ".join(text.split()) or (
                "default" in written and default in written), (name, flag, default)
        for choice in action.choices or ():
            assert str(choice) in text, (name, flag, choice)


@pytest.mark.parametrize("name", sorted(COMMANDS))
def test_a_flag_means_one_thing_in_every_command(name):
    for action in COMMANDS[name]._actions:
        for flag in action.option_strings:
            kind = GRAMMAR.get(flag)
            if kind == "switch":
                assert isinstance(action, argparse._StoreTrueAction), (name, flag)
            elif kind == "count":
                assert action.type is not None and action.type("3") == 3 and action.nargs is None, (name, flag)
            elif kind == "file":
                assert action.metavar == "FILE", (name, flag)
            elif kind == "folder":
                assert action.metavar == "DIR", (name, flag)
            elif kind == "list":
                assert action.metavar == "P1,P2,…", (name, flag)
            elif kind == "assignment":
                assert isinstance(action, argparse._AppendAction) and action.metavar == "SECTION.KEY=VALUE"


def test_every_command_that_reads_a_job_takes_set():
    for name, command in COMMANDS.items():
        positionals = [a.metavar for a in command._actions if not a.option_strings]
        flags = {f for a in command._actions for f in a.option_strings}
        if "JOB" in positionals:
            assert "--set" in flags, name
    assert {"train", "verify", "scale", "compile", "expand"} <= {
        name for name, c in COMMANDS.items() if any(not a.option_strings and a.metavar == "JOB" for a in c._actions)}


def test_the_readme_documents_every_flag():
    from pathlib import Path

    readme = (Path(__file__).resolve().parents[1] / "README.md").read_text()
    section = readme.split("### Flags", 1)[1].split("\n## ", 1)[0]
    for name, command in COMMANDS.items():
        assert f"`{name}`" in section, name
        for action in command._actions:
            for flag in action.option_strings:
                if flag not in ("-h", "--help"):
                    assert f"`{flag}" in section, (name, flag)


def test_the_demo_refuses_too_few_rows_before_writing_anything(tmp_path):
    from helpers import run_cli

    done = run_cli(["demo", "--rows", "300", "--out-dir", str(tmp_path / "demo")])
    assert done.returncode == 2 and "`--rows` must be ≥ 400" in done.stderr and "Traceback" not in done.stderr
    assert not (tmp_path / "demo").exists()
