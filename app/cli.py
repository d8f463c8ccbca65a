"""The `gradfence` command line. Exit codes: 0 success, 2 bad input, 1 internal failure.

Commands: (none) or `open STUDY` the desktop app; `train PRESET` one preset's members; `map
PRESET` the batch size x threshold x seed map; `advise LOG` advice on your own run's log of
gradient norms; `handout STUDY` one HTML file; `shot STUDY` a picture of the window; `check
FILE...`; `presets`. The commands import what they need when they
run, so that `gradfence --help` and the window start fast.
"""

from __future__ import annotations

import argparse
import os
import sys
import traceback
from collections.abc import Sequence
from pathlib import Path

from core import __version__
from core.errors import GradfenceInputError

EXIT_OK, EXIT_INTERNAL, EXIT_INPUT = 0, 1, 2
EXIT_PIPE = 128 + 13  # ended by a closed pipe, as a shell reports SIGPIPE


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
        "threshold on small synthetic problems. With no command, opens the desktop app on the "
        "demo study.",
    )
    parser.add_argument("--version", action="version", version=f"gradfence {__version__}")
    commands = parser.add_subparsers(
        dest="command", metavar="COMMAND", parser_class=InputArgumentParser
    )

    train = commands.add_parser(
        "train", help="train a preset's members (one per [[clip]] table) and show the results"
    )
    train.add_argument("preset", help="a preset file (.toml), or a name `gradfence presets` lists")
    add_overrides(train)
    train.add_argument(
        "--out", type=Path, help="folder for scenario.toml, metrics.csv and members.json"
    )
    train.add_argument(
        "--trace",
        action="store_true",
        help="with --out, also write trace.npz (batches, initial weights, example norms) and "
        "data.npz",
    )

    mapping = commands.add_parser(
        "map", help="train a batch size x threshold x seed map and find the threshold windows"
    )
    mapping.add_argument(
        "preset", help="a preset file (.toml), or a name `gradfence presets` lists"
    )
    add_overrides(mapping)
    mapping.add_argument(
        "--out",
        type=Path,
        default=None,
        help="folder for map.csv, windows.json, profile.json (default: maps/NAME, one folder "
        "per preset)",
    )
    mapping.add_argument(
        "--jobs",
        type=int,
        default=None,
        help="processes training at once (default and at most: the cores the memory allows); "
        "does not apply with --cluster",
    )
    mapping.add_argument(
        "--cluster",
        metavar="ADDRESS",
        default=None,
        help="a Dask scheduler address, e.g. tcp://host:8786; needs pip install "
        "'gradfence[cluster]'; the workers there replace --jobs",
    )
    mapping.add_argument(
        "--cluster-timeout",
        type=float,
        default=10.0,
        metavar="SECONDS",
        help="how long to wait for the scheduler to answer and for its first worker (default 10)",
    )
    mapping.add_argument(
        "--resume",
        action="store_true",
        help="continue a stopped map in --out without training its finished members again",
    )
    mapping.add_argument(
        "--fresh",
        action="store_true",
        help="start the map in --out over, dropping what is there",
    )
    mapping.add_argument(
        "--tolerance",
        type=float,
        default=None,
        help="a threshold is in the window when its loss above the task's floor is within "
        "(1 + tolerance) of the best at that batch size (default: the preset's map.tolerance)",
    )

    open_cmd = commands.add_parser("open", help="open a study in the desktop app")
    open_cmd.add_argument("study", type=Path, help="a .study.toml file")

    shot = commands.add_parser("shot", help="train a study offscreen and save the window as PNG")
    shot.add_argument("study", type=Path, help="a .study.toml file")
    shot.add_argument("--out", type=Path, required=True, help="the PNG to write")
    shot.add_argument(
        "--seconds",
        type=float,
        default=60.0,
        help="train the entries this long at most (default 60; they may finish sooner)",
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

    handout = commands.add_parser(
        "handout", help="write a study as one self-contained HTML file (trains what is not cached)"
    )
    handout.add_argument("study", type=Path, help="a .study.toml file")
    handout.add_argument("--out", type=Path, required=True, help="the HTML file to write")

    check = commands.add_parser("check", help="validate presets and studies")
    check.add_argument("files", type=Path, nargs="+", metavar="FILE")

    commands.add_parser("presets", help="list the shipped and your own presets, with their files")

    from app import advise_command

    advise_command.add_parser(commands)
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
    except BrokenPipeError:  # the reader went away (`gradfence presets | head -1`): no more to say
        devnull = os.open(os.devnull, os.O_WRONLY)
        os.dup2(devnull, sys.stdout.fileno())  # nor at exit, when Python flushes stdout
        return EXIT_PIPE
    except Exception:  # a bug of ours: say so, and keep the traceback for the report
        print("internal error (please report it with the text below):", file=sys.stderr)
        traceback.print_exc()
        return EXIT_INTERNAL


def _dispatch(argv: list[str]) -> int:
    args = build_parser().parse_args(argv)
    if args.command is None or args.command == "open":
        from app.desktop import launch

        return launch(getattr(args, "study", None))  # the window handles SIGTERM itself
    from app.cli_commands import sigterm_as_interrupt

    with sigterm_as_interrupt():  # SIGTERM ends a command as Ctrl-C does: workers ended first
        return _run(args)


def _run(args: argparse.Namespace) -> int:
    if args.command == "shot":
        from app.shot import shot
        from core.fileio import check_out_file

        if not args.seconds > 0:
            raise GradfenceInputError(f"--seconds = {args.seconds:g} must be greater than 0.")
        check_out_file(args.out, (".png",), "PNG")
        line = shot(
            args.study, args.out, args.seconds, args.size, args.entry, args.present, args.collapse
        )
        print(line)
        return EXIT_OK
    if args.command == "handout":
        from core.fileio import check_out_file

        check_out_file(args.out, (".html", ".htm"), "handout (HTML)")
        from app.handout import write_handout

        count, failed = write_handout(args.study, args.out)
        detail = f"; failed: {', '.join(failed)}" if failed else ""
        print(f"wrote {args.out} ({count} entries{detail})")
        return EXIT_OK if not failed else EXIT_INTERNAL
    if args.command == "train":
        from app.cli_commands import command_train

        return command_train(args.preset, args.overrides, args.out, args.trace)
    if args.command == "map":
        from app.cli_commands import command_map

        return command_map(args)
    if args.command == "check":
        from app.cli_commands import command_check

        return command_check(args.files)
    if args.command == "advise":
        from app import advise_command

        return advise_command.run(args)
    from app.cli_commands import command_presets

    return command_presets()


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
