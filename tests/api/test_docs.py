"""The documentation matches the program: README's command reference is the parser's."""

from __future__ import annotations

from pathlib import Path

from impact.cli import build_parser, command_reference

README = Path(__file__).resolve().parents[2] / "README.md"


def test_readme_command_reference_is_the_parsers():
    text = README.read_text(encoding="utf-8")
    block = text.split("<!-- commands:start -->\n", 1)[1].split("<!-- commands:end -->", 1)[0]
    assert block == command_reference(), "regenerate README's command reference from impact.cli.command_reference()"


def test_every_subcommand_and_option_is_in_the_reference():
    ref = command_reference()
    parser = build_parser()
    sub = next(a for a in parser._actions if a.dest == "command")
    for name, p in sub.choices.items():
        assert f"**`impact {name}`**" in ref
        for a in p._actions:
            for flag in a.option_strings:
                if flag not in ("-h", "--help"):
                    assert f"`{flag}" in ref, (name, flag)
            assert a.help or a.option_strings == ["-h", "--help"], (name, a.dest)  # every argument is explained
