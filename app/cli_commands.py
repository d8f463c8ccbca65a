"""The work behind `gradfence train`, `map`, `check` and `presets`, and what they print."""

from __future__ import annotations

import argparse
import contextlib
import math
import shlex
import signal
import sys
import textwrap
import threading
import time
from collections.abc import Iterator
from pathlib import Path
from typing import TYPE_CHECKING, TextIO

import numpy as np

from core.errors import GradfenceInputError

if TYPE_CHECKING:
    from core.results import RunResult
    from core.scenario import Scenario

EXIT_OK, EXIT_INTERNAL, EXIT_INPUT = 0, 1, 2


def resolve_preset(text: str) -> Path:
    """A preset file named on the command line: a path, or a name `gradfence presets` lists."""
    path = Path(text)
    if path.exists() or path.suffix == ".toml" or "/" in text:
        return path
    from core.presets import list_presets

    for info in list_presets():
        if text in (info.path.stem, info.name):
            return info.path
    raise GradfenceInputError(
        f"{text}: no such file, and no preset of that name; `gradfence presets` lists them."
    )


def load_preset(text: str, overrides: list[str]) -> Scenario:
    from core.scenario import load_scenario, parse_override

    notices: list[str] = []
    scenario = load_scenario(resolve_preset(text), notices)
    for notice in notices:
        print(f"note: {notice}", file=sys.stderr)
    if overrides:
        scenario = scenario.with_overrides(dict(parse_override(o) for o in overrides))
    return scenario


def command_train(preset: str, overrides: list[str], out: Path | None, trace: bool) -> int:
    from core.fileio import check_out_folder
    from core.member import run_members
    from core.memory import check_train_fits

    scenario = load_preset(preset, overrides)
    if trace and out is None:
        raise GradfenceInputError("--trace writes trace.npz and data.npz into --out; add --out.")
    if out is not None:
        check_out_folder(out)
    check_train_fits(scenario, trace)  # before the data is built: one sentence, not a swap storm
    from core.engine import Engine
    from core.results import collect, write_run

    engine = Engine(scenario, run_members(scenario), trace=trace)
    progress = Progress(scenario.train.steps, sys.stderr)
    result = collect(engine, lambda record: progress.update(record.step))
    progress.close()
    print(format_table(result))
    if out is not None:
        written = write_run(result, out, trace)
        print(f"wrote {', '.join(p.name for p in written)} to {out}")
    return EXIT_OK


def command_map(args: argparse.Namespace) -> int:
    import json

    from core.analysis import analyse, sentence, window_line, windows_json
    from core.fileio import write_text_atomic
    from core.formats import json_ready
    from core.map_run import MapWorkerError, run_map
    from core.maps import plan

    if args.jobs is not None and args.jobs < 1:
        raise GradfenceInputError(f"--jobs = {args.jobs} must be at least 1.")
    if args.jobs is not None and args.cluster is not None:
        raise GradfenceInputError(
            "--jobs does not apply with --cluster: the workers' --nthreads and --nworkers set "
            "how many chunks train at once; drop --jobs."
        )
    if not args.cluster_timeout > 0:
        raise GradfenceInputError(
            f"--cluster-timeout = {args.cluster_timeout:g} must be greater than 0."
        )
    if args.resume and args.fresh:
        raise GradfenceInputError("--resume and --fresh contradict each other; choose one.")
    scenario = load_preset(args.preset, args.overrides)
    tolerance = scenario.map.tolerance if args.tolerance is None else args.tolerance
    if not (math.isfinite(tolerance) and 0 < tolerance <= 100):
        raise GradfenceInputError(f"--tolerance = {tolerance:g} must be above 0 and at most 100.")
    out = args.out or Path("maps") / resolve_preset(args.preset).stem
    chunks = plan(scenario)
    points = sum(len(c.points) for c in chunks)
    print(
        f"{scenario.name}: {points} members at batch sizes "
        f"{', '.join(map(str, scenario.map.batch_sizes))}",
        file=sys.stderr,
    )
    progress = Progress(points, sys.stderr, label="members")
    resume = resume_command(args, out)
    try:
        with sigterm_as_interrupt():
            rows = run_map(
                scenario,
                out,
                args.jobs,
                resume=args.resume,
                fresh=args.fresh,
                on_progress=lambda p: progress.update(p.members_done),
                warn=lambda line: print(f"warning: {line}", file=sys.stderr),
                cluster=args.cluster,
                cluster_timeout=args.cluster_timeout,
            )
    except KeyboardInterrupt:
        progress.close()
        print(
            f"stopped; the finished members are in {out}: continue with `{resume}`.",
            file=sys.stderr,
        )
        return EXIT_INTERNAL
    except MapWorkerError as exc:
        progress.close()
        raise GradfenceInputError(
            f"{exc.reason}; the finished members are in {out}: continue with `{resume}`."
        ) from None
    progress.close()
    from core.tasks import floor_source, loss_floor

    floor = loss_floor(scenario)
    results = analyse(rows, tolerance, floor)
    from core.profile import norm_profile, profile_sentence, suggest_thresholds, suggestion_line

    # JSON has no NaN or infinity: json_ready spells them null and "inf", and allow_nan=False
    # makes sure nothing else slips through as the invalid NaN token.
    found = json_ready(windows_json(results, tolerance, floor, floor_source(scenario)))
    write_text_atomic(out / "windows.json", json.dumps(found, indent=2, allow_nan=False) + "\n")
    profile = norm_profile(scenario)
    suggestions = suggest_thresholds(scenario)
    profile_json = profile.as_json()
    profile_json["suggestions"] = [s.as_json() for s in suggestions]
    write_text_atomic(
        out / "profile.json", json.dumps(json_ready(profile_json), indent=2, allow_nan=False) + "\n"
    )
    for w in results.values():
        print(sentence(w))
        print(window_line(w))
    print(profile_sentence(profile))
    for s in suggestions:
        print(suggestion_line(s, results.get(s.label)))
    print(f"wrote map.csv, windows.json and profile.json to {out}")
    return EXIT_OK


def resume_command(args: argparse.Namespace, out: Path) -> str:
    """The command that continues this map where it stopped, ready to paste: the same preset,
    overrides and cluster (another scenario would be refused), with --resume."""
    words = ["gradfence", "map", args.preset]
    for override in args.overrides:
        words += ["--set", override]
    words += ["--out", str(out)]
    if args.cluster is not None:
        words += ["--cluster", args.cluster]
    return shlex.join([*words, "--resume"])


@contextlib.contextmanager
def sigterm_as_interrupt() -> Iterator[None]:
    """SIGTERM (`kill`, a closing session, a scheduler's stop) ends like Ctrl-C: finished work
    kept, workers ended, the way to go on said; never a process killed with its workers left."""

    def interrupt(signum: int, frame: object) -> None:
        raise KeyboardInterrupt

    if threading.current_thread() is not threading.main_thread():
        yield  # only the main thread may set handlers; a caller's thread keeps its own
        return
    previous = signal.signal(signal.SIGTERM, interrupt)
    try:
        yield
    finally:
        signal.signal(signal.SIGTERM, previous)


def command_check(files: list[Path]) -> int:
    from core.memory import check_fan_fits, check_map_fits, check_train_fits
    from core.scenario import load_scenario
    from core.study_file import is_study, load_study

    failures = 0
    for path in files:
        try:
            if is_study(path):
                study = load_study(path)
                for notice in study.notices:
                    print(f"note: {notice}", file=sys.stderr)
                for number, entry in enumerate(study.entries, start=1):
                    if entry.scenario is None:
                        continue
                    try:
                        fits = check_fan_fits if entry.kind == "fan" else check_map_fits
                        fits(entry.scenario)
                    except GradfenceInputError as exc:
                        raise GradfenceInputError(
                            f"{path}: entry {number} ({entry.title!r}): {exc}"
                        ) from None
                print(f"ok: {path} (study {study.title!r}, {len(study.entries)} entries)")
                continue
            notices: list[str] = []
            scenario = load_scenario(path, notices)
            for notice in notices:
                print(f"note: {notice}", file=sys.stderr)
            try:  # a preset that cannot train here is not ok, however valid its keys
                check_train_fits(scenario)
                check_map_fits(scenario)
            except GradfenceInputError as exc:
                raise GradfenceInputError(f"{path}: {exc}") from None
        except GradfenceInputError as exc:
            failures += 1
            print(f"error: {exc}", file=sys.stderr)
            continue
        print(f"ok: {path} ({scenario.name}, {len(scenario.clip)} clipping setups)")
    return EXIT_INPUT if failures else EXIT_OK


def command_presets() -> int:
    from core.presets import list_presets, shipped_dir, user_dir

    presets = list_presets()
    print(f"shipped presets: {shipped_dir()}\nyour presets: {user_dir()}\n")
    for info in presets:
        origin = "shipped" if info.shipped else "yours"
        if info.scenario is None:
            print(f"{info.path.stem}  [{origin}, does not load]  {info.path}\n    {info.error}")
            continue
        print(f"{info.path.stem}  [{origin}]  {info.name}  ({info.path})")
        if info.scenario.notes:
            lines = textwrap.wrap(
                info.scenario.notes, 96, max_lines=2, placeholder=" ...", break_on_hyphens=False
            )
            print("\n".join(f"    {line}" for line in lines))
    print("\n`gradfence train NAME` and `gradfence map NAME` take a name from this list.")
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
        filled = int(width * done / max(self.total, 1))
        bar = "#" * filled + "." * (width - filled)
        eta = f"{left:5.1f} s left" if math.isfinite(left) else ""
        self.stream.write(f"\r[{bar}] {self.label} {done}/{self.total}  {eta}")
        self.stream.flush()

    def close(self) -> None:
        if self.enabled:
            self.stream.write("\n")
            self.stream.flush()


def _mean_over_steps(values: np.ndarray) -> np.ndarray:
    counts = np.isfinite(values).sum(axis=0)
    total = np.where(np.isfinite(values), values, 0.0).sum(axis=0)
    return np.where(counts > 0, total / np.maximum(counts, 1), np.nan)


def format_table(result: RunResult) -> str:
    """Final results per member: the loss, the task metric, clipping and the outliers."""
    metric = "val_accuracy" if "val_accuracy" in result.metrics else "val_r2"
    rows = [
        (
            "member",
            "method",
            "threshold",
            "val loss",
            metric.replace("val_", ""),
            "clipped",
            "pass-through",
            "outlier share",
            "diverged",
        )
    ]
    shares = _mean_over_steps(result.metric("clipped_share"))
    passes = _mean_over_steps(result.metric("outlier_pass"))
    outlier_shares = _mean_over_steps(
        np.where(result.metric("batch_outliers") > 0, result.metric("outlier_share"), np.nan)
    )
    for i, m in enumerate(result.members):
        diverged = result.diverged_at[i]
        counts = m.clip.spec.counts if m.method != "none" else ""
        rows.append(
            (
                m.name,
                m.method,
                _threshold_text(m.clip.rule, m.threshold),
                _fmt(result.final("val_loss")[i]),
                _fmt(result.final(metric)[i]),
                f"{shares[i]:.0%} of {counts}" if counts and np.isfinite(shares[i]) else "-",
                _pct(passes[i]),
                _pct(outlier_shares[i]),
                f"step {diverged}" if diverged is not None else "no",
            )
        )
    widths = [max(len(r[c]) for r in rows) for c in range(len(rows[0]))]
    lines = [
        "  ".join(cell.ljust(w) for cell, w in zip(r, widths, strict=True)).rstrip() for r in rows
    ]
    lines.insert(1, "  ".join("-" * w for w in widths))
    return (
        f"{result.scenario.name}: batch size {result.batch_size}, {int(result.steps[-1])} steps; "
        "pass-through and outlier share are means over the logged steps that held outliers\n"
        + "\n".join(lines)
    )


def _threshold_text(rule: str, threshold: float) -> str:
    if rule != "fixed":
        return rule  # adaptive: the threshold moves with the watched norm
    return "-" if math.isnan(threshold) else f"{threshold:g}"


def _fmt(value: float) -> str:
    return "-" if math.isnan(value) else f"{value:.4g}"


def _pct(value: float) -> str:
    return "-" if not np.isfinite(value) else f"{value:.0%}"
