"""A map's output folder: one scenario, one writer, nothing lost, nothing wrong accepted.

The reference for every table is an uninterrupted map of the same preset, byte for byte. Each
test names the old behaviour it guards against (issue 12).
"""

from __future__ import annotations

import json
import signal
from pathlib import Path

import pytest

from app.cli import main
from core.errors import GradfenceInputError
from core.map_folder import STATE_FILE, TABLE_FILE
from core.map_run import MapProgress, run_map
from core.maps import read_table
from core.scenario import Scenario
from tests.os_processes import start, wait_for
from tests.tiny_presets import tiny_map, tiny_map_text


@pytest.fixture(scope="module")
def reference(tmp_path_factory: pytest.TempPathFactory) -> bytes:
    """map.csv of the tiny preset, trained without interruption."""
    out = tmp_path_factory.mktemp("reference")
    run_map(tiny_map(), out, jobs=1)
    return (out / TABLE_FILE).read_bytes()


def interrupted(scenario: Scenario, out: Path, chunks: int = 2) -> int:
    """A map stopped (as by Ctrl-C) after some chunks; returns the members on file."""

    def stop_after(progress: MapProgress) -> None:
        if progress.computed >= chunks:
            raise KeyboardInterrupt

    with pytest.raises(KeyboardInterrupt):
        run_map(scenario, out, jobs=1, on_progress=stop_after)
    return len(read_table(out / TABLE_FILE))


def test_a_second_writer_is_refused_and_a_resume_with_another_preset_too(
    tmp_path: Path, mark: str, reference: bytes, capsys: pytest.CaptureFixture[str]
) -> None:
    # The previous version let two `sweep` processes write one folder; after one was killed,
    # --resume with the other preset finished in 2.4 s, exited 0 and reported the other
    # preset's windows: rows were matched on (label, threshold, B, seed) alone, nothing locked.
    mine, other = tmp_path / "mine.toml", tmp_path / "other.toml"
    mine.write_text(tiny_map_text())
    other.write_text(tiny_map_text().replace("lr = 0.02", "lr = 0.03"))
    out = tmp_path / "out"
    first = start(["map", str(mine), "--out", str(out), "--jobs", "1"], mark)
    try:
        table = out / TABLE_FILE
        assert wait_for(lambda: table.exists() and len(table.read_text().splitlines()) > 1, 120)
        assert main(["map", str(other), "--out", str(out), "--jobs", "1"]) == 2
        err = capsys.readouterr().err
        assert f"another `gradfence map` (process {first.pid}) is writing this folder" in err
        first.send_signal(signal.SIGKILL)
        first.communicate(timeout=60)
    finally:
        first.kill()
        first.communicate(timeout=60)
    on_file = table.read_bytes()
    assert main(["map", str(other), "--out", str(out), "--jobs", "1", "--resume"]) == 2
    err = capsys.readouterr().err
    assert "holds a map of another scenario" in err and "--fresh" in err
    assert "Traceback" not in err and table.read_bytes() == on_file
    assert main(["map", str(mine), "--out", str(out), "--jobs", "1", "--resume"]) == 0
    assert table.read_bytes() == reference


def test_a_map_of_another_version_is_not_resumed(tmp_path: Path) -> None:
    scenario = tiny_map()
    interrupted(scenario, tmp_path)
    state = json.loads((tmp_path / STATE_FILE).read_text())
    state["version"] = "0.0.1"
    (tmp_path / STATE_FILE).write_text(json.dumps(state))
    with pytest.raises(GradfenceInputError, match=r"made by Gradfence 0\.0\.1.*--fresh"):
        run_map(scenario, tmp_path, jobs=1, resume=True)


@pytest.mark.parametrize(
    ("state", "why"),
    [
        (b"\x00\x9f not json", "does not read"),
        (b"null", "holds null, not a table"),
        (b"[1, 2, 3]", "holds a list, not a table"),
        (b'{"version": "0.1.0", "members": 108}', 'has no "scenario_hash"'),
    ],
    ids=["garbage", "null", "list", "no-hash"],
)
def test_a_state_file_that_does_not_read_is_set_aside_and_the_map_trained_again(
    state: bytes, why: str, tmp_path: Path, reference: bytes
) -> None:
    # The previous version stopped with a traceback on a garbage state file, and on one
    # without a hash resumed against "hash None".
    scenario = tiny_map()
    interrupted(scenario, tmp_path)
    (tmp_path / STATE_FILE).write_bytes(state)
    warnings: list[str] = []
    run_map(scenario, tmp_path, jobs=1, resume=True, warn=warnings.append)
    assert any(why in w and "set aside as map-state.json.bad" in w for w in warnings), warnings
    assert (tmp_path / "map-state.json.bad").read_bytes() == state
    assert (tmp_path / "map.csv.bad").exists()  # the table it could no longer vouch for
    assert (tmp_path / TABLE_FILE).read_bytes() == reference


def test_a_table_without_a_state_file_is_set_aside(tmp_path: Path, reference: bytes) -> None:
    scenario = tiny_map()
    interrupted(scenario, tmp_path)
    (tmp_path / STATE_FILE).unlink()
    warnings: list[str] = []
    run_map(scenario, tmp_path, jobs=1, resume=True, warn=warnings.append)
    assert any("has no map-state.json" in w for w in warnings), warnings
    assert (tmp_path / TABLE_FILE).read_bytes() == reference


def test_a_garbage_cell_costs_its_member_only(tmp_path: Path, reference: bytes) -> None:
    # The previous version stopped with ValueError on a cell that was not a number. Rows are
    # checked one by one when the state file does not vouch for the table's bytes (one written
    # before it did); one that does sets a changed table aside whole (the test below).
    scenario = tiny_map()
    interrupted(scenario, tmp_path)
    state = json.loads((tmp_path / STATE_FILE).read_text())
    del state["table"]
    (tmp_path / STATE_FILE).write_text(json.dumps(state))
    table = tmp_path / TABLE_FILE
    lines = table.read_text().splitlines(keepends=True)
    cells = lines[1].split(",")
    cells[5] = "0.3x"  # final_val_loss
    lines[1] = ",".join(cells)
    table.write_text("".join(lines))
    warnings: list[str] = []
    progress: list[MapProgress] = []
    run_map(
        scenario, tmp_path, jobs=1, resume=True, warn=warnings.append, on_progress=progress.append
    )
    assert warnings == [
        f"{table} line 2: final_val_loss '0.3x' is not a number; that member trains again."
    ]
    assert progress[0].done == 1  # of the two chunks on file, the one with the bad cell is redone
    assert table.read_bytes() == reference


def test_the_cli_says_what_it_set_aside(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    preset = tmp_path / "tiny.toml"
    preset.write_text(tiny_map_text())
    out = tmp_path / "out"
    interrupted(tiny_map(), out)
    (out / STATE_FILE).write_text("{")
    assert main(["map", str(preset), "--out", str(out), "--jobs", "1", "--resume"]) == 0
    err = capsys.readouterr().err
    assert f"warning: {out / STATE_FILE}: does not read (JSONDecodeError); set aside" in err


def test_a_second_map_into_the_default_folder_keeps_the_first(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture[str]
) -> None:
    # The previous version wrote every sweep to sweep-out/ and deleted the table already there.
    monkeypatch.chdir(tmp_path)
    Path("tiny.toml").write_text(tiny_map_text())
    assert main(["map", "tiny.toml", "--jobs", "1"]) == 0
    table = tmp_path / "maps" / "tiny" / TABLE_FILE
    first = table.read_bytes()
    assert main(["map", "tiny.toml", "--set", "train.lr=0.03", "--jobs", "1"]) == 2
    err = capsys.readouterr().err
    assert "holds a map of another scenario (108 of 108 members finished)" in err
    assert "--fresh" in err and "--resume" not in err
    assert table.read_bytes() == first


def test_a_rerun_without_resume_after_a_stop_asks_before_dropping_anything(
    tmp_path: Path, reference: bytes, capsys: pytest.CaptureFixture[str]
) -> None:
    # The previous version deleted the finished members of a stopped sweep when it was run
    # again without --resume.
    preset = tmp_path / "tiny.toml"
    preset.write_text(tiny_map_text())
    out = tmp_path / "out"
    finished = interrupted(tiny_map(), out)
    on_file = (out / TABLE_FILE).read_bytes()
    assert main(["map", str(preset), "--out", str(out), "--jobs", "1"]) == 2
    err = capsys.readouterr().err
    assert f"holds a map already ({finished} of 108 members finished)" in err
    assert "--resume" in err and "--fresh" in err
    assert (out / TABLE_FILE).read_bytes() == on_file
    assert main(["map", str(preset), "--out", str(out), "--jobs", "1", "--fresh"]) == 0
    assert (out / TABLE_FILE).read_bytes() == reference


def test_without_resume_a_folder_of_another_scenario_is_named_so_and_not_offered_a_resume(
    tmp_path: Path,
) -> None:
    # The previous version said "continue it with --resume" here, and --resume then refused:
    # the folder holds another scenario's map.
    interrupted(tiny_map(), tmp_path)
    other = tiny_map().with_overrides({"train.lr": 0.03})
    with pytest.raises(GradfenceInputError) as refused:
        run_map(other, tmp_path, jobs=1)
    message = str(refused.value)
    assert "holds a map of another scenario" in message and "--fresh" in message
    assert "--resume" not in message


def test_a_file_set_aside_twice_keeps_the_first_one(tmp_path: Path, reference: bytes) -> None:
    # The previous version renamed the second bad state file over the first `.bad`, and the
    # table set aside with it over a complete one, without a word.
    scenario = tiny_map()
    interrupted(scenario, tmp_path)
    first_table = (tmp_path / TABLE_FILE).read_bytes()
    (tmp_path / STATE_FILE).write_bytes(b"not json")
    run_map(scenario, tmp_path, jobs=1, resume=True, warn=lambda line: None)
    (tmp_path / STATE_FILE).write_bytes(b"[1, 2, 3]")
    warnings: list[str] = []
    run_map(scenario, tmp_path, jobs=1, resume=True, warn=warnings.append)
    assert (tmp_path / "map-state.json.bad").read_bytes() == b"not json"
    assert (tmp_path / "map-state.json.bad.2").read_bytes() == b"[1, 2, 3]"
    assert (tmp_path / "map.csv.bad").read_bytes() == first_table
    assert (tmp_path / "map.csv.bad.2").read_bytes() == reference  # the finished table
    assert any("set aside as map.csv.bad.2" in w for w in warnings), warnings
    assert (tmp_path / TABLE_FILE).read_bytes() == reference


def test_a_table_swapped_in_under_a_matching_state_file_is_set_aside(
    tmp_path: Path, reference: bytes
) -> None:
    # The previous version resumed in silence (exit 0) from another preset's map.csv copied
    # over this map's, same grid, under this map's own state file: rows carry no scenario.
    scenario, other = tiny_map(), tiny_map().with_overrides({"train.lr": 0.03})
    mine, theirs = tmp_path / "mine", tmp_path / "theirs"
    interrupted(scenario, mine)
    interrupted(other, theirs)
    foreign = (theirs / TABLE_FILE).read_bytes()
    (mine / TABLE_FILE).write_bytes(foreign)
    warnings: list[str] = []
    run_map(scenario, mine, jobs=1, resume=True, warn=warnings.append)
    assert any("is not the table map-state.json vouches for" in w for w in warnings), warnings
    assert (mine / "map.csv.bad").read_bytes() == foreign
    assert (mine / TABLE_FILE).read_bytes() == reference


def test_a_kill_between_a_rows_append_and_the_state_leaves_a_table_that_resumes(
    tmp_path: Path, reference: bytes, monkeypatch: pytest.MonkeyPatch
) -> None:
    # The state vouches for a prefix of the table: rows appended after it are this map's own.
    from core import map_folder

    scenario = tiny_map()
    vouched = map_folder.MapFolder._vouch
    calls = {"n": 0}

    def vouch_then_die(self: map_folder.MapFolder) -> None:
        calls["n"] += 1
        if calls["n"] == 3:  # the rewrite, one append vouched for, then killed before the next
            raise KeyboardInterrupt
        vouched(self)

    monkeypatch.setattr(map_folder.MapFolder, "_vouch", vouch_then_die)
    with pytest.raises(KeyboardInterrupt):
        run_map(scenario, tmp_path, jobs=1)
    monkeypatch.setattr(map_folder.MapFolder, "_vouch", vouched)
    state = json.loads((tmp_path / STATE_FILE).read_text())
    assert state["table"]["bytes"] < len((tmp_path / TABLE_FILE).read_bytes())
    warnings: list[str] = []
    run_map(scenario, tmp_path, jobs=1, resume=True, warn=warnings.append)
    assert warnings == [] and not (tmp_path / "map.csv.bad").exists()
    assert (tmp_path / TABLE_FILE).read_bytes() == reference
