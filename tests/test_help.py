"""Every command and every option has --help text (argparse's own parser tree is walked)."""

from __future__ import annotations

import argparse

from claimkit.cli import build_parser


def _walk(parser: argparse.ArgumentParser, path: str):
    yield path, parser
    for action in parser._actions:
        if isinstance(action, argparse._SubParsersAction):
            helps = {a.dest: a.help for a in action._choices_actions}
            for name, sub in action.choices.items():
                assert helps.get(name), f"{path} {name}: no help line in the command list"
                yield from _walk(sub, f"{path} {name}")


def test_every_command_and_option_has_help():
    missing = []
    for path, parser in _walk(build_parser(), "claimkit"):
        for action in parser._actions:
            if isinstance(action, (argparse._HelpAction, argparse._SubParsersAction)):
                continue
            if not action.help or action.help == argparse.SUPPRESS:
                missing.append(f"{path} {'/'.join(action.option_strings) or action.dest}")
    assert not missing, missing
