"""Every verb's --help ends with example command lines that the parser accepts.

The promise is the README's ("Every verb has `--help` with examples"); the verbs are
those of DESIGN §5 plus ingest and log. A help text is read as a user sees it, from
``branchwatch VERB --help``, and each example line is parsed by the same parser, so an
example that names a dropped or renamed option fails here.
"""

from __future__ import annotations

import argparse
import shlex

import pytest

from monitor.app import cli

#: The verbs DESIGN §5 names, and those this project added (ingest, log, notify, fleet).
DESIGN_VERBS = {"demo", "check", "curve", "analyze", "report", "run", "alarms", "status"}


def _verbs() -> list[str]:
    parser = cli._parser()
    sub = next(a for a in parser._actions if isinstance(a, argparse._SubParsersAction))
    return sorted(sub.choices)


def test_every_design_verb_is_there() -> None:
    assert DESIGN_VERBS | {"ingest", "log", "notify", "fleet"} == set(_verbs())


@pytest.mark.parametrize("verb", _verbs())
def test_help_shows_examples_that_parse(verb: str, capsys: pytest.CaptureFixture[str]) -> None:
    with pytest.raises(SystemExit) as stop:
        cli.main([verb, "--help"])
    assert stop.value.code == 0
    text = capsys.readouterr().out
    tail = text.split("\nexamples:\n", 1)
    assert len(tail) == 2, f"'branchwatch {verb} --help' has no examples section"
    lines = [ln.strip() for ln in tail[1].splitlines() if ln.strip()]
    assert 1 <= len(lines) <= 3, lines
    assert all(ln.startswith(f"branchwatch {verb}") for ln in lines), lines
    parser = cli._parser()
    for line in lines:
        words = shlex.split(line, comments=True)
        assert words[:2] == ["branchwatch", verb]
        args = parser.parse_args(words[1:])  # exits (fails the test) on an unknown option
        assert args.verb == verb and args.func is not None
