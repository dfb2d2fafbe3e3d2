"""The command table, the research-only caution at every door, and small command-line checks."""

from __future__ import annotations

import argparse
import logging
from pathlib import Path

import pytest

from flairwatch.cli import COMMANDS, build_parser, main
from flairwatch.notice import CAUTION

# DESIGN's cautions: research use only, not for diagnosis, validate on your own scans, local rules
CAUTION_WORDS = ("research use only", "not for diagnosis", "your own scans", "local rules")

# commands that make or ship results: they print the caution as they start (issue 11 item 5)
DOORS = ("process", "watch", "reprocess", "export")


def test_caution_says_what_design_asks() -> None:
    assert "\n" not in CAUTION
    for words in CAUTION_WORDS:
        assert words in CAUTION.lower()


@pytest.mark.parametrize("command", DOORS)
def test_help_of_every_door_carries_the_caution(
    command: str, capsys: pytest.CaptureFixture[str]
) -> None:
    with pytest.raises(SystemExit) as done:
        main([command, "--help"])
    assert done.value.code == 0
    out = " ".join(capsys.readouterr().out.split()).lower()
    for words in ("research use only", "not for diagnosis", "your own scans", "local rules"):
        assert words in out, (command, words)


@pytest.mark.parametrize(
    ("argv", "error"),
    [
        (["process", "{tmp}/none", "--results", "{tmp}/out"], "does not exist"),
        (["watch", "--results", "{tmp}/r", "--state", "{tmp}/s"], "watch needs --inbox"),
        (["reprocess", "--config", "{tmp}/none.yaml"], "cannot read config file"),
        (["export", "--config", "{tmp}/none.yaml"], "cannot read config file"),
    ],
)
def test_every_door_prints_the_caution_first_even_when_it_fails(
    tmp_path: Path, capsys: pytest.CaptureFixture[str], argv: list[str], error: str
) -> None:
    rc = main([a.replace("{tmp}", str(tmp_path)) for a in argv])
    lines = capsys.readouterr().err.strip().splitlines()
    assert rc == 2
    assert lines[0] == CAUTION
    assert len(lines) == 2 and lines[1].startswith("flairwatch: error: ") and error in lines[1]


def test_watch_writes_the_caution_to_its_log(
    tmp_path: Path, tiny_model_manifest: Path, caplog: pytest.LogCaptureFixture
) -> None:
    inbox = tmp_path / "inbox"
    inbox.mkdir()
    argv = ["watch", "--once", "--inbox", str(inbox), "--results", str(tmp_path / "r")]
    argv += ["--state", str(tmp_path / "s"), "--model", str(tiny_model_manifest), "--threads", "1"]
    with caplog.at_level(logging.INFO):
        assert main(argv) == 0
    assert CAUTION in [r.getMessage() for r in caplog.records]


def test_command_table_matches_the_parser() -> None:
    parser = build_parser(load=[c.name for c in COMMANDS])
    sub = next(a for a in parser._actions if isinstance(a, argparse._SubParsersAction))
    assert list(sub.choices) == [c.name for c in COMMANDS]
    for name, p in sub.choices.items():
        assert p.get_default("func") is not None or name == "qc", name  # qc: per action


def test_unknown_command_is_a_usage_error(capsys: pytest.CaptureFixture[str]) -> None:
    with pytest.raises(SystemExit) as done:
        main(["no-such-command"])
    assert done.value.code == 2
    assert "invalid choice" in capsys.readouterr().err


def test_reprocess_help_defaults_are_the_change_reports() -> None:
    """cli.reprocess shows the flag limits without importing the change report; same values."""
    from flairwatch.cli.reprocess import FLAG_DEFAULTS
    from flairwatch.research.change_report import Limits

    d = Limits()
    assert {"volume_ml": d.volume_ml, "percent": d.percent, "dice": d.dice} == FLAG_DEFAULTS


def test_phantoms_command(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    parser = build_parser(load=["phantoms"])
    args = parser.parse_args(["phantoms", "--out", str(tmp_path)])
    assert (args.count, args.first_seed, args.workers) == (10, 1, 1)
    assert main(["phantoms", "--out", str(tmp_path), "--count", "0"]) == 0
    assert main(["phantoms", "--out", str(tmp_path), "--workers", "0"]) == 2
    assert "--workers 0" in capsys.readouterr().err


@pytest.mark.parametrize(
    "argv",
    [["export"], ["canary"], ["qc", "gallery"], ["review"]],
)
def test_commands_that_read_the_ledger_say_how_to_name_it(
    tmp_path: Path, capsys: pytest.CaptureFixture[str], argv: list[str]
) -> None:
    # a config file without a state folder: one line naming the command and what to add
    config = tmp_path / "c.yaml"
    config.write_text(f"results: {tmp_path / 'r'}\n", encoding="utf-8")
    assert main([*argv, "--config", str(config)]) == 2
    last = capsys.readouterr().err.strip().splitlines()[-1]
    assert last == (
        f"flairwatch: error: {argv[0]} needs the ledger: give --config FILE with a 'state' key"
    )
