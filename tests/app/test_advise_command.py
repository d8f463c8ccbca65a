"""`gradfence advise`: advice.json on the shipped example log, and bad logs that end with exit 2
and one sentence naming the file and the line or the column, never a traceback."""

from __future__ import annotations

import json
import sys
from pathlib import Path

import pytest

from app.advise_command import add_parser, run
from app.cli import EXIT_INPUT, EXIT_OK, InputArgumentParser
from core.errors import GradfenceInputError
from tests.conftest import SCENARIOS

EXAMPLE = SCENARIOS / "logs" / "example-run.csv"


def gradfence(argv: list[str]) -> int:
    """The command as app.cli runs every command: GradfenceInputError becomes exit 2 and its
    sentence; anything else would escape with its traceback and fail the test."""
    parser = InputArgumentParser(prog="gradfence")
    add_parser(parser.add_subparsers(dest="command", parser_class=InputArgumentParser))
    try:
        return run(parser.parse_args(argv))
    except GradfenceInputError as exc:
        print(f"error: {exc}", file=sys.stderr)
        return EXIT_INPUT


def test_advise_writes_advice_json_and_prints_the_advice(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    out = tmp_path / "advice"
    argv = ["advise", str(EXAMPLE), "--threshold", "3", "--to-batch", "128", "--out", str(out)]
    assert gradfence(argv) == EXIT_OK
    data = json.loads((out / "advice.json").read_text())
    assert data["steps"] == 3000 and data["carried"]["to_batch"] == 128
    printed = capsys.readouterr().out
    assert "open-loop" in printed and "Suggested" in printed and "becomes" in printed
    assert printed.rstrip().endswith(f"wrote {out / 'advice.json'}")


def test_advise_reads_columns_of_other_names(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    log = tmp_path / "mine.csv"
    rows = "\n".join(f"{i},{1.0 + (i % 7) / 10}" for i in range(1, 301))
    log.write_text("it,gnorm\n" + rows + "\n")
    argv = ["advise", str(log), "--step-column", "it", "--norm-column", "gnorm"]
    assert gradfence([*argv, "--batch-size", "64", "--threshold", "1.5", "--to-batch", "256"]) == 0
    printed = capsys.readouterr().out
    assert "300 logged steps" in printed and "cannot be told apart" in printed


BAD = [
    ("missing column", "step,norm\n1,2\n", [], "has no column 'grad_norm' for the gradient norm"),
    ("non-numeric cell", "step,grad_norm\n1,2\n2,two\n", [], ", line 3: column 'grad_norm'"),
    ("steps out of order", "step,grad_norm\n5,2\n4,2\n", [], ", line 3: step 4 comes after"),
    ("empty file", "", [], " is empty"),
    (
        "mapping naming no column",
        "step,grad_norm\n1,2\n",
        ["--small-norm-column", "local"],
        "has no column 'local', named as the second (small-batch) norm",
    ),
    ("bad batch size", "step,grad_norm\n1,2\n", ["--batch-size", "2.5"], "The batch size 2.5"),
    (
        "column and constant",
        "step,grad_norm\n1,2\n",
        ["--batch-size", "8", "--batch-column", "b"],
        "gradfence: argument --batch-column: not allowed with argument --batch-size",
    ),
    ("bad threshold", "step,grad_norm\n1,2\n", ["--threshold", "-1"], "--threshold -1 must be"),
]


@pytest.mark.parametrize(
    ("text", "extra", "expected"), [b[1:] for b in BAD], ids=[b[0] for b in BAD]
)
def test_a_bad_log_ends_with_exit_2_and_one_sentence(
    tmp_path: Path,
    capsys: pytest.CaptureFixture[str],
    text: str,
    extra: list[str],
    expected: str,
) -> None:
    log = tmp_path / "bad.csv"
    log.write_text(text)
    assert gradfence(["advise", str(log), *extra]) == EXIT_INPUT
    err = capsys.readouterr().err
    assert err.startswith("error: ") and expected in err
    assert err.count("\n") == 1 and "Traceback" not in err
    if "argument" not in expected and not expected.startswith(("The", "--")):
        assert str(log) in err  # the sentence names the file


def test_an_out_path_that_is_a_file_fails_before_the_work(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    taken = tmp_path / "taken"
    taken.write_text("")
    missing = tmp_path / "missing.csv"  # not read at all: --out is checked first
    assert gradfence(["advise", str(missing), "--out", str(taken)]) == EXIT_INPUT
    assert "is a file; give a folder for advice.json" in capsys.readouterr().err


def test_a_metrics_csv_of_several_members_asks_for_one(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    log = tmp_path / "metrics.csv"
    header = "member,method,threshold,batch_size,seed,step,batch_loss,grad_norm_pre,lr"
    rows = [f"{m},global-norm,{m + 1}.0,16,0,{s},0.1,1.0,0.1" for m in (0, 1) for s in (1, 2)]
    log.write_text("\n".join([header, *rows]) + "\n")
    assert gradfence(["advise", str(log)]) == EXIT_INPUT
    err = capsys.readouterr().err
    assert "holds 2 members (0 (global-norm at 1.0), 1 (global-norm at 2.0))" in err
    assert gradfence(["advise", str(log), "--member", "1"]) == EXIT_OK
