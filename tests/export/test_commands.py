"""export/commands.py: the torch side's subcommands, registered through the installed package's
``demur.commands`` entry points (importlib.metadata, as serve/cli.py finds them); flags refused
with a message naming them, before any work starts."""

from __future__ import annotations

from importlib.metadata import entry_points

import pytest

from demur.serve.cli import build_parser, main


def test_every_torch_side_command_registers_from_the_commands_module() -> None:
    found = {ep.name: ep.value for ep in entry_points(group="demur.commands")}
    assert found == {name: f"demur.export.commands:register_{name}"
                     for name in ("train", "export", "calibrate", "evaluate", "bench")}
    parser = build_parser()
    args = parser.parse_args(["calibrate", "B", "--data", "digits", "--target-accuracy", "0.98"])
    assert (args.confidence, args.max_abstain, args.method, args.graph) == (0.9, 0.3, "fixed_sequence", "auto")
    args = parser.parse_args(["train", "--out", "run", "--hidden", "32,16"])
    assert args.hidden == (32, 16) and args.members == 1 and args.posterior == "radial"


def test_a_bad_width_list_is_refused_by_the_parser(capsys: pytest.CaptureFixture[str]) -> None:
    with pytest.raises(SystemExit) as info:
        main(["train", "--out", "run", "--hidden", "0,4"])
    assert info.value.code == 2 and "expected positive integers; got '0,4'" in capsys.readouterr().err


def test_export_says_what_it_needs(capsys: pytest.CaptureFixture[str]) -> None:
    assert main(["export", "--out", "b"]) == 1
    assert "give a checkpoint DIR from 'demur train'" in capsys.readouterr().err
    assert main(["export", "--factory", "mod:fn", "--out", "b"]) == 1
    assert "--factory needs --weights" in capsys.readouterr().err
