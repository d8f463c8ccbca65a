"""Reading logs of norms, checked against Python's own csv and json readers, and bad logs that
each give one sentence naming the file and the line or the column."""

from __future__ import annotations

import csv
import io
import json
import math
from pathlib import Path

import numpy as np
import pytest

from core.errors import GradfenceInputError
from core.normlog import METRICS_MEMBER_COLUMNS, LogColumns, load_log, parse_log_text
from core.results import MEMBER_COLUMNS


def reference_csv(text: str, column: str) -> list[float]:
    """The column through the standard library: csv rows, float() of every cell, '' as NaN."""
    rows = [r for r in csv.DictReader(io.StringIO(text.lstrip("\ufeff"))) if any(r.values())]
    return [float(r[column]) if r[column].strip() else math.nan for r in rows]


def same(a: np.ndarray, b: list[float]) -> bool:
    return bool(np.array_equal(a, np.asarray(b), equal_nan=True))


def random_log(rng: np.random.Generator, rows: int) -> str:
    lines = ["note,step,grad_norm,batch_size,small_grad_norm,small_batch_size,loss,lr"]
    for step in range(1, rows + 1):
        norm = repr(float(rng.lognormal()))
        small = repr(float(rng.lognormal())) if step % 3 == 0 else ""
        lines.append(
            f'"a, b",{step},{norm},{64 if step < rows // 2 else 128},{small},'
            f"{'16' if small else ''},{float(rng.random())!r},1e-3"
        )
    return "\n".join(lines) + "\n"


@pytest.mark.parametrize("in_memory", [False, True])
def test_a_csv_log_reads_as_the_csv_module_reads_it(tmp_path: Path, in_memory: bool) -> None:
    text = random_log(np.random.default_rng(1), 300)
    path = tmp_path / "run.csv"
    path.write_text(text)
    log = parse_log_text(text, "run.csv") if in_memory else load_log(path)
    assert log.rows == 300 and log.source == "csv"
    assert log.steps.tolist() == reference_csv(text, "step")
    for name, column in (
        ("norm", "grad_norm"),
        ("batch", "batch_size"),
        ("small_norm", "small_grad_norm"),
        ("small_batch", "small_batch_size"),
        ("loss", "loss"),
        ("lr", "lr"),
    ):
        values = getattr(log, name)
        assert values is not None and same(values, reference_csv(text, column)), name


def test_windows_line_ends_a_byte_order_mark_and_blank_lines_change_nothing(
    tmp_path: Path,
) -> None:
    text = "\ufeffstep,grad_norm\r\n\r\n1,0.5\r\n2,0.25\r\n\r\n3,2\r\n"
    path = tmp_path / "win.csv"
    path.write_bytes(text.encode("utf-8"))
    log = load_log(path)
    assert log.steps.tolist() == [1, 2, 3] and log.norm.tolist() == [0.5, 0.25, 2.0]


def test_json_lines_read_as_the_json_module_reads_them(tmp_path: Path) -> None:
    rng = np.random.default_rng(2)
    rows = [
        {"step": s, "grad_norm": float(rng.lognormal()), "batch_size": 32, "loss": None}
        for s in range(1, 101)
    ]
    path = tmp_path / "run.jsonl"
    path.write_text("\n".join(json.dumps(r) for r in rows) + "\n")
    log = load_log(path)
    assert log.source == "jsonl" and log.rows == 100
    assert log.norm.tolist() == [r["grad_norm"] for r in rows]
    assert log.batch is not None and (log.batch == 32).all()
    assert log.loss is not None and np.isnan(log.loss).all()  # null: not given on that row


def test_non_finite_norms_are_kept_and_counted_in_every_spelling() -> None:
    # float() is the reference for the spellings; JSON null and an empty CSV cell mean NaN.
    spellings = ["inf", "nan", "NaN", "Infinity", "-inf", "1.5", ""]
    text = "step,grad_norm\n" + "".join(f"{i},{s}\n" for i, s in enumerate(spellings, 1))
    log = parse_log_text(text, "x.csv")
    assert same(log.norm, [float(s) if s else math.nan for s in spellings])
    assert log.rows == 7 and log.nonfinite_steps == 6
    lines = [
        '{"step": 1, "grad_norm": null}',
        '{"step": 2, "grad_norm": "inf"}',
        '{"step": 3, "grad_norm": NaN}',
        '{"step": 4, "grad_norm": Infinity}',
        '{"step": 5, "grad_norm": 2}',
    ]
    json_log = parse_log_text("\n".join(lines), "x.jsonl")
    assert same(json_log.norm, [math.nan, math.inf, math.nan, math.inf, 2.0])
    assert json_log.nonfinite_steps == 4


def test_columns_with_other_names_and_constant_batch_sizes(tmp_path: Path) -> None:
    text = "it,norm,local_norm,bs\n10,1.0,2.0,64\n20,1.5,,64\n"
    columns = LogColumns(
        step_column="it",
        norm_column="norm",
        batch_column="bs",
        small_norm_column="local_norm",
        small_batch_size=8,
    )
    log = parse_log_text(text, "mine.csv", columns)
    assert log.steps.tolist() == [10, 20] and not log.every_step
    assert log.small_batch is not None and log.small_batch.tolist() == [8.0, 8.0]
    assert same(log.small_norm if log.small_norm is not None else np.zeros(0), [2.0, math.nan])
    constant = parse_log_text("step,grad_norm\n1,1\n", "c.csv", LogColumns(batch_size=256))
    assert constant.batch is not None and constant.batch.tolist() == [256.0]
    assert constant.read_from == {"step": "step", "norm": "grad_norm"}


def metrics_text(members: int) -> str:
    header = [*METRICS_MEMBER_COLUMNS, "batch_loss", "grad_norm_pre", "lr", "diverged"]
    lines = [",".join(header)]
    for m in range(members):
        method, threshold = ("none", "") if m == 0 else ("global-norm", "1.0")
        for step in range(1, 4):
            lines.append(f"{m},{method},{threshold},32,0,{step},0.5,{0.25 * step + m},0.1,0")
    return "\n".join(lines) + "\n"


def test_metrics_csv_columns_are_the_ones_results_writes() -> None:
    assert METRICS_MEMBER_COLUMNS == MEMBER_COLUMNS


def test_a_metrics_csv_loads_one_member_as_a_log() -> None:
    log = parse_log_text(metrics_text(3), "out/metrics.csv", member=2)
    assert log.source == "metrics" and log.member == 2
    assert log.norm.tolist() == [2.25, 2.5, 2.75] and log.steps.tolist() == [1, 2, 3]
    assert log.batch is not None and log.loss is not None and log.lr is not None
    assert log.precision == "float32"  # every norm is a float32 value, as the engine writes
    single = parse_log_text(metrics_text(1), "one/metrics.csv")
    assert single.member == 0


def test_a_metrics_csv_of_several_members_asks_for_one_and_lists_them() -> None:
    with pytest.raises(GradfenceInputError) as caught:
        parse_log_text(metrics_text(3), "out/metrics.csv")
    assert str(caught.value) == (
        "out/metrics.csv holds 3 members (0 (none), 1 (global-norm at 1.0), "
        "2 (global-norm at 1.0)); choose one with --member."
    )
    with pytest.raises(GradfenceInputError, match=r"has no member 7; its members are 0 \(none\)"):
        parse_log_text(metrics_text(3), "out/metrics.csv", member=7)


BAD_LOGS = [
    ("", "bad.csv is empty"),
    ("\n\n", "bad.csv is empty"),
    ("step,grad_norm\n", "bad.csv has a header but no rows"),
    ("step,norm\n1,2\n", "bad.csv has no column 'grad_norm' for the gradient norm"),
    ("step,grad_norm\n1,0.5\n2,abc\n", "bad.csv, line 3: column 'grad_norm' holds 'abc'"),
    ("step,grad_norm\n1,0.5\nx,1\n", "bad.csv, line 3: column 'step' holds 'x'"),
    ("step,grad_norm\n2,0.5\n1,1\n", "bad.csv, line 3: step 1 comes after step 2"),
    ("step,grad_norm\n1,0.5\n1,1\n", "bad.csv, line 3: step 1 appears a second time"),
    ("step,grad_norm\n1.5,0.5\n", "bad.csv, line 2: the step (column 'step') is 1.5"),
    ("step,grad_norm\n,0.5\n", "bad.csv, line 2: the step (column 'step') is empty"),
    ("step,grad_norm\n1,0.5\n2\n", "bad.csv, line 3: the row has 1 cells"),
    ("step,grad_norm,batch_size\n1,0.5,0\n", "bad.csv, line 2: column 'batch_size' holds 0"),
    ("step,grad_norm,batch_size\n1,0.5,2.5\n", "bad.csv, line 2: column 'batch_size' holds 2.5"),
    ("step;grad_norm\n1;0.5\n", "bad.csv, line 1: the header has one column"),
    ("step,step\n1,2\n", "bad.csv, line 1: the header names step more than once"),
    (
        "step,grad_norm,batch_size,small_grad_norm,small_batch_size\n1,1,8,2,8\n",
        "bad.csv, line 2: the small batch (8) is not smaller than the batch (8)",
    ),
    (
        '{"step": 1, "grad_norm": 1}\n{"step": 2, "grad_norm": [1]}\n',
        "bad.csv, line 2: 'grad_norm'",
    ),
    ('{"step": 1, "grad_norm": 1}\n{"step": 2, "grad_norm": 1\n', "bad.csv, line 2: not a JSON"),
    ('{"step": 1, "grad_norm": "abc"}\n', "bad.csv, line 1: 'grad_norm' holds \"abc\""),
    ('{"step": 1, "grad_norm": 1' + "0" * 400 + "}\n", "bad.csv, line 1: 'grad_norm' holds 1000"),
    ('{"step": 1, "grad_norm": 1}\n{"grad_norm": 1}\n', "bad.csv, line 2: the object has no"),
]


@pytest.mark.parametrize(("text", "start"), BAD_LOGS, ids=[b[1] for b in BAD_LOGS])
def test_a_bad_log_gives_one_sentence_naming_the_file_and_the_line_or_column(
    text: str, start: str
) -> None:
    with pytest.raises(GradfenceInputError) as caught:
        parse_log_text(text, "bad.csv")
    message = str(caught.value)
    assert message.startswith(start)
    assert message.endswith(".") and "\n" not in message


@pytest.mark.parametrize(
    ("columns", "start"),
    [
        (LogColumns(batch_column="bs"), "bad.csv has no column 'bs', named as the batch size"),
        (LogColumns(norm_column="n"), "bad.csv has no column 'n' for the gradient norm"),
        (LogColumns(small_norm_column="local"), "bad.csv has no column 'local', named as"),
    ],
)
def test_a_mapping_naming_no_column_says_which_columns_there_are(
    columns: LogColumns, start: str
) -> None:
    with pytest.raises(GradfenceInputError) as caught:
        parse_log_text("step,grad_norm\n1,2\n", "bad.csv", columns)
    assert str(caught.value).startswith(start)
    assert "(its columns are step, grad_norm)" in str(caught.value)


@pytest.mark.parametrize("size", [0, -4, 2.5, math.inf, math.nan])
def test_a_constant_batch_size_must_be_a_positive_whole_number(size: float) -> None:
    with pytest.raises(GradfenceInputError, match="is not a positive whole number of examples"):
        LogColumns(batch_size=size)


def test_a_batch_size_is_a_column_or_a_constant_not_both() -> None:
    with pytest.raises(GradfenceInputError, match="not both"):
        LogColumns(batch_column="bs", batch_size=32)


def test_a_missing_file_and_a_folder_are_named(tmp_path: Path) -> None:
    with pytest.raises(GradfenceInputError, match=r"nope\.csv does not exist"):
        load_log(tmp_path / "nope.csv")
    with pytest.raises(GradfenceInputError, match="is a folder"):
        load_log(tmp_path)
