"""`gradfence advise LOG`: threshold advice for your own run from its log of gradient norms."""

from __future__ import annotations

import argparse
import math
import sys
from pathlib import Path
from typing import Any

from core.errors import GradfenceInputError

EXIT_OK = 0  # as app.cli


def add_parser(subparsers: Any) -> None:
    """Add the `advise` subcommand to the `gradfence` parser's subparsers."""
    advise = subparsers.add_parser(
        "advise",
        help="replay clipping rules on your own run's log of gradient norms and suggest "
        "thresholds (open-loop)",
        description="Read a log of pre-clip gradient norms (CSV with a header, JSON Lines, or a "
        "metrics.csv of `gradfence train`), replay every threshold rule on it, suggest thresholds, "
        "estimate gradient noise from a second, smaller-batch norm, and carry a threshold to "
        "another batch size. The replay is open-loop: it shows what each rule would have "
        "decided on these norms, not how training would have gone with it.",
    )
    advise.add_argument("log", type=Path, help="the log: .csv with a header, or .jsonl")
    advise.add_argument("--out", type=Path, help="folder to write advice.json into")
    advise.add_argument(
        "--step-column", default="step", metavar="NAME", help="column of the step (step)"
    )
    advise.add_argument(
        "--norm-column",
        default="grad_norm",
        metavar="NAME",
        help="column of the pre-clip gradient norm (grad_norm; grad_norm_pre in a metrics.csv)",
    )
    batch = advise.add_mutually_exclusive_group()
    batch.add_argument(
        "--batch-column", metavar="NAME", help="column of the batch size (batch_size if present)"
    )
    batch.add_argument(
        "--batch-size", type=float, metavar="B", help="the batch size, the same on every step"
    )
    advise.add_argument(
        "--small-norm-column",
        metavar="NAME",
        help="column of a second norm on a smaller batch (small_grad_norm if present)",
    )
    small = advise.add_mutually_exclusive_group()
    small.add_argument(
        "--small-batch-column",
        metavar="NAME",
        help="column of the smaller batch's size (small_batch_size if present)",
    )
    small.add_argument(
        "--small-batch-size", type=float, metavar="B", help="the smaller batch's size, constant"
    )
    advise.add_argument(
        "--member", type=int, metavar="N", help="the member to read from a metrics.csv"
    )
    advise.add_argument(
        "--threshold", type=float, metavar="C", help="a fixed threshold to replay and carry"
    )
    advise.add_argument(
        "--to-batch",
        type=int,
        metavar="B",
        help="carry the threshold (--threshold, else the suggested one) to this batch size",
    )
    advise.add_argument(
        "--max-clip-share",
        type=float,
        default=0.01,
        metavar="S",
        help="suggestions clip the spikes only, and at most this share of steps (default 0.01)",
    )


def run(args: argparse.Namespace) -> int:
    """Run `gradfence advise`; bad input raises GradfenceInputError (exit 2 in app.cli)."""
    from core.advice import advice_lines, advise, write_advice
    from core.normlog import LogColumns, load_log

    if args.out is not None:
        _check_out(args.out)
    if args.threshold is not None and not (math.isfinite(args.threshold) and args.threshold > 0):
        raise GradfenceInputError(f"--threshold {args.threshold:g} must be a number above 0.")
    if args.to_batch is not None and args.to_batch < 1:
        raise GradfenceInputError(f"--to-batch {args.to_batch} must be at least 1.")
    if not 0 < args.max_clip_share <= 1:
        raise GradfenceInputError(
            f"--max-clip-share {args.max_clip_share:g} must be above 0 and at most 1."
        )
    columns = LogColumns(
        step_column=args.step_column,
        norm_column=args.norm_column,
        batch_column=args.batch_column,
        batch_size=args.batch_size,
        small_norm_column=args.small_norm_column,
        small_batch_column=args.small_batch_column,
        small_batch_size=args.small_batch_size,
    )
    log = load_log(args.log, columns, args.member)
    advice = advise(
        log,
        threshold=args.threshold,
        to_batch=args.to_batch,
        max_clip_share=args.max_clip_share,
    )
    sys.stdout.write("\n".join(advice_lines(advice)) + "\n")
    if args.out is not None:
        path = write_advice(advice, args.out)
        sys.stdout.write(f"wrote {path}\n")
    return EXIT_OK


def _check_out(out: Path) -> None:
    """Fail before the work, not after it, when advice.json cannot go to `out`."""
    if out.exists() and not out.is_dir():
        raise GradfenceInputError(f"--out {out} is a file; give a folder for advice.json.")
    try:
        out.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise GradfenceInputError(f"--out {out} cannot be created ({exc.strerror}).") from None
    if (out / "advice.json").is_dir():
        raise GradfenceInputError(f"--out {out} holds a folder named advice.json; remove it.")
