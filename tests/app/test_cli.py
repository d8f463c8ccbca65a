"""The `gradfence` command against mistakes a person makes: one sentence, exit 2, no traceback,
and before any work starts. Each test names the old behaviour it guards against (issue 12)."""

from __future__ import annotations

import subprocess
import sys
from pathlib import Path

import pytest

from app.cli import main
from app.cli_commands import load_preset
from core.methods import spec
from core.scenario import loads_scenario
from tests.conftest import SCENARIOS
from tests.os_processes import without_privileges
from tests.tiny_presets import TINY_FAN, tiny_map_text

DEMO = SCENARIOS / "demo.study.toml"


@pytest.fixture
def preset(tmp_path: Path) -> Path:
    path = tmp_path / "tiny.toml"
    path.write_text(tiny_map_text())
    return path


def one_sentence(err: str, *parts: str) -> None:
    """The error is one line saying what to change, with no traceback."""
    lines = [line for line in err.splitlines() if line.startswith("error: ")]
    assert len(lines) == 1, err
    assert "Traceback" not in err
    for part in parts:
        assert part in lines[0], lines[0]


# -- item 7: output paths, checked before the work ---------------------------------------------


@pytest.mark.parametrize("command", ["train", "map"])
def test_an_out_that_is_a_file_is_refused_before_training(
    command: str, preset: Path, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    # The previous version trained first and then failed on the write with a traceback.
    existing = tmp_path / "results"
    existing.write_text("a file a person keeps\n")
    assert main([command, str(preset), "--out", str(existing)]) == 2
    captured = capsys.readouterr()
    one_sentence(captured.err, f"--out {existing}", "is a file, not a folder")
    assert captured.out == ""  # no results: nothing was trained
    assert existing.read_text() == "a file a person keeps\n"


@pytest.mark.parametrize("command", ["train", "map", "handout"])
def test_an_out_in_a_read_only_folder_is_refused_before_training(
    command: str, preset: Path, shared_tmp: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    # The previous version trained, then died on the write (PermissionError traceback).
    shared_preset = shared_tmp / "tiny.toml"
    shared_preset.write_text(preset.read_text())
    source = DEMO if command == "handout" else shared_preset
    # The same way to the same check, once with privileges: whatever it imports is imported
    # then, for root's own files are closed to nobody.
    (shared_tmp / "a-file").write_text("")
    warm = shared_tmp if command == "handout" else shared_tmp / "a-file"
    assert main([command, str(source), "--out", str(warm)]) == 2
    capsys.readouterr()
    locked = shared_tmp / "locked"
    locked.mkdir()
    locked.chmod(0o555)
    target = locked / "page.html" if command == "handout" else locked
    with without_privileges():
        code = main([command, str(source), "--out", str(target)])
    assert code == 2
    captured = capsys.readouterr()
    one_sentence(captured.err, "not writable")
    assert captured.out == ""
    assert list(locked.iterdir()) == []


def test_a_handout_out_that_is_a_folder_is_refused(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    # The previous version trained every entry, then failed with IsADirectoryError.
    assert main(["handout", str(DEMO), "--out", str(tmp_path)]) == 2
    one_sentence(capsys.readouterr().err, "is a folder; name the handout (HTML) file")


def test_a_handout_out_below_a_file_is_refused(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    (tmp_path / "notes").write_text("")
    out = tmp_path / "notes" / "week" / "page.html"
    assert main(["handout", str(DEMO), "--out", str(out)]) == 2
    one_sentence(capsys.readouterr().err, "is a file, not a folder")


def test_a_shot_out_that_is_not_a_png_is_refused(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    # The previous version trained for --seconds and then failed to save x.txt.
    out = tmp_path / "x.txt"
    assert main(["shot", str(DEMO), "--out", str(out)]) == 2
    one_sentence(capsys.readouterr().err, "a PNG file ends in .png")
    assert not out.exists()


# -- item 8: --trace --------------------------------------------------------------------------


def test_trace_without_out_is_refused(preset: Path, capsys: pytest.CaptureFixture[str]) -> None:
    # The previous version ignored --trace without a word when --out was missing.
    assert main(["train", str(preset), "--trace"]) == 2
    captured = capsys.readouterr()
    one_sentence(captured.err, "--trace", "add --out")
    assert captured.out == ""


# -- item 9: small things ---------------------------------------------------------------------


def test_a_preset_and_a_study_that_begin_with_a_byte_order_mark_load(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    # The previous version refused a file saved by Notepad as "Invalid statement".
    preset = tmp_path / "bom.toml"
    preset.write_bytes(b"\xef\xbb\xbf" + tiny_map_text().encode())
    study = tmp_path / "bom.study.toml"
    text = 'schema = 2\ntitle = "With a mark"\n[[entry]]\nkind = "map"\npreset = "bom.toml"\n'
    study.write_bytes(b"\xef\xbb\xbf" + text.encode())
    assert main(["check", str(preset), str(study)]) == 0
    out = capsys.readouterr().out
    assert f"ok: {preset} (Tiny map" in out and "'With a mark', 1 entries" in out


def test_a_table_then_its_key_blames_the_table(
    preset: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    # The previous version blamed train.steps, the key that was right.
    args = ["train", str(preset), "--set", "train=5", "--set", "train.steps=20"]
    assert main(args) == 2
    err = capsys.readouterr().err
    one_sentence(err, "train is a table, not a value")
    assert "train.steps=20" not in err


@pytest.mark.parametrize("value", ["inf", "nan", "-1", "0"])
def test_a_tolerance_out_of_range_is_refused(
    value: str, preset: Path, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    # The previous version took --tolerance inf, and every threshold was in every window.
    out = tmp_path / "never"
    assert main(["map", str(preset), "--tolerance", value, "--out", str(out)]) == 2
    one_sentence(capsys.readouterr().err, "--tolerance", "must be above 0 and at most 100")
    assert not out.exists()


@pytest.mark.parametrize(("low", "high"), [("1e-300", "1.0"), ("0.1", "1e308")])
def test_grid_thresholds_far_outside_any_norm_are_refused(
    low: str, high: str, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    # The previous version trained grids down to 1e-300 and up to 1e308 (overflow in the grid).
    text = tiny_map_text().replace(
        "thresholds = {min = 0.01, max = 10.0, count = 4}",
        f"thresholds = {{min = {low}, max = {high}, count = 4}}",
    )
    path = tmp_path / "grid.toml"
    path.write_text(text)
    assert main(["check", str(path)]) == 2
    one_sentence(capsys.readouterr().err, "map.thresholds", "must be a number from 1e-09 to 1e+09")


def test_a_new_method_from_the_command_line_takes_that_methods_default_threshold(
    tmp_path: Path,
) -> None:
    # The previous version kept global-norm's threshold 1 as unit-agc's lambda, which clips
    # nothing; the reference is the same table written in the preset without a threshold.
    path = tmp_path / "fan.toml"
    path.write_text(TINY_FAN.replace('kind = "linear"', 'kind = "mlp"\nhidden = [8]'))
    overridden = load_preset(str(path), ["clip.1.method=unit-agc"])
    written = loads_scenario(
        path.read_text().replace('method = "global-norm"\nthreshold = 1.0', 'method = "unit-agc"')
    )
    assert overridden.clip[1].threshold == written.clip[1].threshold == spec("unit-agc").threshold
    assert overridden.clip[1].threshold != 1.0
    # Naming the method a table already has keeps its threshold (it was reset to the default).
    agc = load_preset(str(path), ["clip.1.method=unit-agc", "clip.1.threshold=0.02"])
    again = agc.with_overrides({"clip.1.method": "unit-agc"})
    assert again.clip[1].threshold == 0.02 != spec("unit-agc").threshold


def test_an_empty_preset_and_an_empty_study_are_not_ok(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    # The previous version called an empty file a valid preset, and a 0-byte study
    # "ok, 0 entries".
    empty_preset, empty_study = tmp_path / "empty.toml", tmp_path / "empty.study.toml"
    empty_preset.write_text("")
    empty_study.write_text("  \n")
    assert main(["check", str(empty_preset), str(empty_study)]) == 2
    captured = capsys.readouterr()
    assert "ok:" not in captured.out
    assert f"error: {empty_preset}: is empty" in captured.err
    assert f"error: {empty_study}: is empty" in captured.err
    # A file of comments alone holds nothing either.
    empty_preset.write_text("# settings to come\n")
    empty_study.write_text("# entries to come\n\n")
    assert main(["check", str(empty_preset), str(empty_study)]) == 2
    captured = capsys.readouterr()
    assert "ok:" not in captured.out and captured.err.count("is empty") == 2


def test_version_prints_the_packaged_version(capsys: pytest.CaptureFixture[str]) -> None:
    # The previous version had no --version; the reference is the installed package's metadata
    # (pyproject.toml reads the version from core.__version__ when the package is built).
    import importlib.metadata

    version = importlib.metadata.version("gradfence")
    with pytest.raises(SystemExit) as ended:
        main(["--version"])
    assert ended.value.code == 0
    assert capsys.readouterr().out.strip() == f"gradfence {version}"


def test_presets_lists_where_each_preset_lives_and_train_takes_a_listed_name(
    capsys: pytest.CaptureFixture[str],
) -> None:
    # The previous version printed names without paths, and `train NAME` took only paths.
    assert main(["presets"]) == 0
    out = capsys.readouterr().out
    shipped = sorted(p for p in SCENARIOS.glob("*.toml") if not p.name.endswith(".study.toml"))
    for path in shipped:
        line = next(line for line in out.splitlines() if line.startswith(path.stem + " "))
        assert f"({path})" in line
    # A listed name, not a path: trained for a few steps.
    assert main(["train", "linear-target-shift", "--set", "train.steps=3"]) == 0
    out = capsys.readouterr().out
    assert "Linear regression, shifted targets: batch size" in out


def test_a_reader_that_goes_away_ends_the_command_without_a_traceback() -> None:
    # The previous version printed "internal error" and a BrokenPipeError traceback for
    # `gradfence presets | head -1`. The pipe is closed before the command writes its first line.
    process = subprocess.Popen(
        [sys.executable, "-c", "import sys; from app.cli import main; sys.exit(main(['presets']))"],
        stdout=subprocess.PIPE,
        stderr=subprocess.PIPE,
    )
    assert process.stdout is not None and process.stderr is not None
    process.stdout.close()
    with process.stderr:
        err = process.stderr.read().decode()
    assert process.wait(timeout=60) == 141  # 128 + SIGPIPE, as a shell reports a closed pipe
    assert err == ""
