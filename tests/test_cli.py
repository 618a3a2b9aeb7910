"""The command-line front end: registry, usage errors, error lines."""

from __future__ import annotations

import pytest

from stream import cli


def test_every_registered_command_has_help_and_example():
    parser = cli.build_parser()
    sub = next(a for a in parser._actions if a.dest == "command")
    assert set(sub.choices) <= set(cli.COMMANDS)
    for name, p in sub.choices.items():
        text = p.format_help()
        assert "example:" in text and f"ranktide {name}" in text, name


def test_no_command_prints_help_and_exits_2(capsys):
    assert cli.main([]) == 2


def test_unknown_option_is_one_line_exit_2(capsys):
    with pytest.raises(SystemExit) as exc:
        cli.main(["--no-such-option"])
    assert exc.value.code == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "see --help" in err[0]
