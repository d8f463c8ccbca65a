"""The `gradfence` command line. Exit codes: 0 success, 2 bad input, 1 internal failure."""

from __future__ import annotations

import argparse
import math
import sys
import textwrap
import time
import traceback
from collections.abc import Sequence
from pathlib import Path
from typing import TYPE_CHECKING, TextIO

import numpy as np

from core.errors import GradfenceInputError

if TYPE_CHECKING:  # the commands import their modules lazily, to start fast
    from core.results import RunResult

EXIT_OK, EXIT_INTERNAL, EXIT_INPUT = 0, 1, 2


class InputArgumentParser(argparse.ArgumentParser):
    """argparse that reports a bad command line as our input error (exit 2, one sentence)."""

    def error(self, message: str) -> None:  # type: ignore[override]
        raise GradfenceInputError(f"gradfence: {message}; see `gradfence --help`.")


def add_overrides(parser: argparse.ArgumentParser) -> None:
    parser.add_argument(
        "--set",
        dest="overrides",
        action="append",
        default=[],
        metavar="KEY=VALUE",
        help="override a key, e.g. --set train.batch_size=128 (repeatable)",
    )


def build_parser() -> argparse.ArgumentParser:
    parser = InputArgumentParser(
        prog="gradfence",
        description="Measure how gradient clipping methods respond to outliers, batch size and "
        "threshold on small synthetic problems.",
    )
    commands = parser.add_subparsers(
        dest="command", metavar="COMMAND", parser_class=InputArgumentParser
    )

    run = commands.add_parser("run", help="train a preset's members and report the results")
    run.add_argument("preset", type=Path, help="a scenario preset (.toml)")
    add_overrides(run)
    run.add_argument("--out", type=Path, help="folder for scenario.toml, metrics.csv, summary.json")
    run.add_argument(
        "--trace",
        action="store_true",
        help="also write trace.npz (batches, initial weights, example norms) and data.npz",
    )

    sweep = commands.add_parser(
        "sweep", help="train batch size x threshold x seed grids and find the threshold windows"
    )
    sweep.add_argument("preset", type=Path, help="a scenario preset (.toml)")
    add_overrides(sweep)
    sweep.add_argument(
        "--out",
        type=Path,
        default=Path("sweep-out"),
        help="folder for sweep.csv, windows.json, profile.json (default: sweep-out)",
    )
    sweep.add_argument(
        "--jobs", type=int, default=None, help="worker processes (default: the number of cores)"
    )
    sweep.add_argument(
        "--resume",
        action="store_true",
        help="continue a stopped sweep in --out without recomputing finished points",
    )
    sweep.add_argument(
        "--tolerance",
        type=float,
        default=None,
        help="a threshold is in the window when its loss is within (1 + tolerance) "
        "of the best at that batch size (default: the preset's sweep.tolerance)",
    )

    open_cmd = commands.add_parser("open", help="open a notebook in the desktop app")
    open_cmd.add_argument("notebook", type=Path, help="a .notebook.toml file")

    shot = commands.add_parser("shot", help="run a notebook offscreen and save the window as PNG")
    shot.add_argument("notebook", type=Path, help="a .notebook.toml file")
    shot.add_argument("--out", type=Path, required=True, help="the PNG to write")
    shot.add_argument(
        "--seconds",
        type=float,
        default=60.0,
        help="run the entries this long at most (default 60; they may finish sooner)",
    )
    shot.add_argument(
        "--size",
        type=_size,
        default=(1600, 1100),
        metavar="WxH",
        help="the window's size in pixels (default 1600x1100)",
    )
    shot.add_argument(
        "--entry", type=int, metavar="N", help="scroll entry N (from 1) to the top and select it"
    )
    shot.add_argument(
        "--collapse",
        type=_numbers,
        default=(),
        metavar="N,M",
        help="fold these entries (from 1) to their headers",
    )
    shot.add_argument(
        "--present",
        action="store_true",
        help="picture the presentation view at --entry (default the first) instead",
    )

    report = commands.add_parser(
        "report", help="write a notebook as one self-contained HTML file (runs what is not cached)"
    )
    report.add_argument("notebook", type=Path, help="a .notebook.toml file")
    report.add_argument("--out", type=Path, required=True, help="the HTML file to write")

    check = commands.add_parser("check", help="validate presets and notebooks")
    check.add_argument("files", type=Path, nargs="+", metavar="FILE")

    commands.add_parser("presets", help="list shipped and user presets")
    return parser


def main(argv: Sequence[str] | None = None) -> int:
    """Entry point of the console script."""
    try:
        return _dispatch(list(sys.argv[1:] if argv is None else argv))
    except GradfenceInputError as exc:
        print(f"error: {exc}", file=sys.stderr)
        return EXIT_INPUT
    except KeyboardInterrupt:
        print("stopped.", file=sys.stderr)
        return EXIT_INTERNAL
    except Exception:  # a bug of ours: say so, and keep the traceback for the report
        print("internal error (please report it with the text below):", file=sys.stderr)
        traceback.print_exc()
        return EXIT_INTERNAL


def _dispatch(argv: list[str]) -> int:
    args = build_parser().parse_args(argv)
    if args.command is None:
        from app.desktop import launch

        return launch()
    if args.command == "open":
        from app.desktop import launch

        return launch(args.notebook)
    if args.command == "shot":
        from app.desktop import shot

        if not args.seconds > 0:
            raise GradfenceInputError(f"--seconds = {args.seconds:g} must be greater than 0.")
        return shot(
            args.notebook,
            args.out,
            args.seconds,
            args.size,
            args.entry,
            args.present,
            args.collapse,
        )
    if args.command == "report":
        from app.report import write_report

        if args.out.suffix.lower() not in (".html", ".htm"):
            raise GradfenceInputError(f"--out {args.out}: a report is an .html file.")
        count, failed = write_report(args.notebook, args.out)
        detail = f"; failed: {', '.join(failed)}" if failed else ""
        print(f"wrote {args.out} ({count} entries{detail})")
        return EXIT_OK if not failed else EXIT_INTERNAL
    if args.command == "run":
        return command_run(args.preset, args.overrides, args.out, args.trace)
    if args.command == "sweep":
        return command_sweep(
            args.preset, args.overrides, args.out, args.jobs, args.resume, args.tolerance
        )
    if args.command == "check":
        return command_check(args.files)
    return command_presets()


def command_run(preset: Path, overrides: list[str], out: Path | None, trace: bool) -> int:
    from core.engine import Engine, run_members
    from core.results import collect, write_run
    from core.scenario import load_scenario, parse_override

    scenario = load_scenario(preset)
    if overrides:
        scenario = scenario.with_overrides(dict(parse_override(o) for o in overrides))
    engine = Engine(scenario, run_members(scenario), trace=trace)
    progress = Progress(scenario.train.steps, sys.stderr)
    result = collect(engine, lambda record: progress.update(record.step))
    progress.close()
    print(format_table(result))
    if out is not None:
        written = write_run(result, out, trace)
        print(f"wrote {', '.join(p.name for p in written)} to {out}")
    return EXIT_OK


def command_sweep(
    preset: Path,
    overrides: list[str],
    out: Path,
    jobs: int | None,
    resume: bool,
    tolerance: float | None,
) -> int:
    import json

    from core.analysis import analyse, sentence, window_line, windows_json
    from core.scenario import load_scenario, parse_override
    from core.sweep import plan, run_sweep

    if jobs is not None and jobs < 1:
        raise GradfenceInputError(f"--jobs = {jobs} must be at least 1.")
    scenario = load_scenario(preset)
    if overrides:
        scenario = scenario.with_overrides(dict(parse_override(o) for o in overrides))
    if tolerance is None:
        tolerance = scenario.sweep.tolerance
    elif not tolerance > 0:
        raise GradfenceInputError(f"--tolerance = {tolerance:g} must be greater than 0.")
    chunks = plan(scenario)
    points = sum(len(c.points) for c in chunks)
    print(
        f"{scenario.name}: {points} points in {len(chunks)} stacks, batch sizes "
        f"{', '.join(map(str, scenario.sweep.batch_sizes))}",
        file=sys.stderr,
    )
    progress = Progress(len(chunks), sys.stderr, label="stacks")
    try:
        rows = run_sweep(scenario, out, jobs, resume, lambda p: progress.update(p.done))
    except KeyboardInterrupt:
        progress.close()
        print(
            f"stopped; finished stacks are in {out / 'sweep.csv'}: continue with --resume.",
            file=sys.stderr,
        )
        return EXIT_INTERNAL
    progress.close()
    results = analyse(rows, tolerance)
    from core.fileio import write_text_atomic
    from core.profile import norm_profile, profile_sentence, suggest_thresholds

    write_text_atomic(
        out / "windows.json", json.dumps(windows_json(results, tolerance), indent=2) + "\n"
    )
    profile = norm_profile(scenario)
    suggestions = suggest_thresholds(scenario)
    profile_json = profile.as_json()
    profile_json["suggestions"] = [s.__dict__ for s in suggestions]
    write_text_atomic(out / "profile.json", json.dumps(profile_json, indent=2) + "\n")
    for w in results.values():
        print(sentence(w))
        print(window_line(w))
    print(profile_sentence(profile))
    for s in suggestions:
        where = f" at batch size {s.batch_size}" if s.batch_size else ""
        print(
            f"suggested {s.label} threshold: {s.threshold:.3g}, the {s.percentile:g}th percentile "
            f"of unclipped warm-up norms{where} (clips {s.clip_rate:.0%} of them)."
        )
    print(f"wrote sweep.csv, windows.json and profile.json to {out}")
    return EXIT_OK


def command_check(files: list[Path]) -> int:
    from core.notebook import is_notebook, load_notebook
    from core.scenario import load_scenario

    failures = 0
    for path in files:
        try:
            if is_notebook(path):
                notebook = load_notebook(path)
                print(f"ok: {path} (notebook {notebook.title!r}, {len(notebook.entries)} entries)")
                continue
            scenario = load_scenario(path)
        except GradfenceInputError as exc:
            failures += 1
            print(f"error: {exc}", file=sys.stderr)
            continue
        print(f"ok: {path} ({scenario.name}, {len(scenario.clip)} clipping setups)")
    return EXIT_INPUT if failures else EXIT_OK


def command_presets() -> int:
    from core.presets import list_presets

    for info in list_presets():
        origin = "shipped" if info.shipped else "user"
        if info.scenario is None:
            print(f"{info.path.name}  [{origin}, broken]\n    {info.error}")
            continue
        print(f"{info.path.name}  [{origin}]  {info.name}")
        if info.scenario.notes:
            lines = textwrap.wrap(
                info.scenario.notes, 96, max_lines=2, placeholder=" ...", break_on_hyphens=False
            )
            print("\n".join(f"    {line}" for line in lines))
    return EXIT_OK


class Progress:
    """A one-line progress bar on a terminal; silent when the stream is not a terminal."""

    def __init__(self, total: int, stream: TextIO, label: str = "step") -> None:
        self.total, self.stream, self.label = total, stream, label
        self.enabled = stream.isatty()
        self.start = time.monotonic()

    def update(self, done: int) -> None:
        if not self.enabled:
            return
        elapsed = time.monotonic() - self.start
        left = elapsed / done * (self.total - done) if done else math.nan
        width = 30
        filled = int(width * done / self.total)
        bar = "#" * filled + "." * (width - filled)
        eta = f"{left:5.1f} s left" if math.isfinite(left) else ""
        self.stream.write(f"\r[{bar}] {self.label} {done}/{self.total}  {eta}")
        self.stream.flush()

    def close(self) -> None:
        if self.enabled:
            self.stream.write("\n")
            self.stream.flush()


def format_table(result: RunResult) -> str:
    """Final results per member: the loss, the task metric, the mean clipped share."""
    metric = "val_accuracy" if "val_accuracy" in result.metrics else "val_r2"
    rows = [
        (
            "member",
            "method",
            "threshold",
            "val loss",
            metric.replace("val_", ""),
            "clipped",
            "diverged",
        )
    ]
    share = result.metric("clipped_share")
    counts = (~np.isnan(share)).sum(axis=0)
    shares = np.where(counts > 0, np.nansum(share, axis=0) / np.maximum(counts, 1), np.nan)
    for i, m in enumerate(result.members):
        diverged = result.diverged_at[i]
        rows.append(
            (
                m.name,
                m.method,
                _threshold_text(m.clip.rule, m.threshold),
                _fmt(result.final("val_loss")[i]),
                _fmt(result.final(metric)[i]),
                f"{shares[i]:.0%}" if not math.isnan(shares[i]) else "-",
                f"step {diverged}" if diverged is not None else "no",
            )
        )
    widths = [max(len(r[c]) for r in rows) for c in range(len(rows[0]))]
    lines = [
        "  ".join(cell.ljust(w) for cell, w in zip(r, widths, strict=True)).rstrip() for r in rows
    ]
    lines.insert(1, "  ".join("-" * w for w in widths))
    return (
        f"{result.scenario.name}: batch size {result.batch_size}, {int(result.steps[-1])} steps\n"
        + "\n".join(lines)
    )


def _threshold_text(rule: str, threshold: float) -> str:
    if rule != "fixed":
        return rule  # adaptive: the threshold moves with the watched norm
    return "-" if math.isnan(threshold) else f"{threshold:g}"


def _fmt(value: float) -> str:
    return "-" if math.isnan(value) else f"{value:.4g}"


def _numbers(text: str) -> tuple[int, ...]:
    """`2,4` as (2, 4), for --collapse."""
    try:
        return tuple(int(p) for p in text.split(",") if p.strip())
    except ValueError:
        raise argparse.ArgumentTypeError(f"{text!r} is not entry numbers like 2,4") from None


def _size(text: str) -> tuple[int, int]:
    """`1600x1100` as (1600, 1100), for --size."""
    parts = text.lower().split("x")
    try:
        width, height = (int(p) for p in parts)
    except ValueError:
        raise argparse.ArgumentTypeError(f"{text!r} is not WIDTHxHEIGHT, e.g. 1600x1100") from None
    if not (200 <= width <= 8000 and 200 <= height <= 8000):
        raise argparse.ArgumentTypeError(f"{text}: each side must be 200 to 8000 pixels")
    return width, height


if __name__ == "__main__":
    sys.exit(main())
