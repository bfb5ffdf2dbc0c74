"""The ``blanket plot``, ``blanket inspect`` and ``blanket logs repair`` sub-commands.

The main command (``blanket.cli``) adds them with :func:`add_plot_parser`,
:func:`add_inspect_parser` and :func:`add_logs_parser`; each parser's ``handler`` default is
the function to call with the parsed arguments. Errors are :class:`ValueError` subclasses
(``LogError``), which the main command prints as one line before exiting with status 2.
``plot`` and ``inspect`` report a damaged episode file on stderr (one line each) and go on
with the others; ``--strict`` makes it an error.
"""

from __future__ import annotations

import argparse
import sys
from collections.abc import Sequence
from pathlib import Path
from typing import Any

__all__ = [
    "add_plot_parser",
    "run_plot",
    "add_inspect_parser",
    "run_inspect",
    "add_logs_parser",
    "run_logs",
]

_STRICT_HELP = "fail (exit 2) on any damaged episode file instead of skipping it"


def _report(problems: Sequence[BaseException]) -> None:
    """One stderr line per damaged episode file skipped."""
    for problem in problems:
        print(f"blanket: skipped: {problem}", file=sys.stderr)


def _episode(text: str) -> int:
    try:
        value = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected an episode number >= 0, got {text!r}") from None
    if value < 0:
        raise argparse.ArgumentTypeError(f"expected an episode number >= 0, got {value}")
    return value


def add_plot_parser(subparsers: Any) -> argparse.ArgumentParser:
    """Add ``plot RUN_DIR [--out DIR] [--episode N] [--video] [--fps N]``."""
    parser = subparsers.add_parser(
        "plot",
        help="write figures (and optionally a replay video) of a logged episode",
        description="Write the PNG figures of one episode of a run folder: tool-tip path, "
        "belief against truth, free energy and prediction errors, commands against limits.",
    )
    parser.add_argument("run_dir", type=Path, metavar="RUN_DIR", help="run folder")
    parser.add_argument(
        "--out",
        type=Path,
        default=None,
        metavar="DIR",
        help="output folder (default RUN_DIR/figures)",
    )
    parser.add_argument(
        "--episode",
        type=_episode,
        default=None,
        metavar="N",
        help="episode number (default: the first)",
    )
    parser.add_argument(
        "--video",
        action="store_true",
        help="also render a replay video (MP4, or GIF without imageio-ffmpeg)",
    )
    parser.add_argument(
        "--fps", type=int, default=30, metavar="N", help="video frame rate (default 30)"
    )
    parser.add_argument("--strict", action="store_true", help=_STRICT_HELP)
    parser.set_defaults(handler=run_plot)
    return parser


def run_plot(args: argparse.Namespace) -> int:
    """Write the figures; print one path per line. Returns the exit status (0)."""
    from blanket.logs.plots import load_episode, plot_run

    problems: list[Any] = []
    strict = getattr(args, "strict", False)
    paths = plot_run(
        args.run_dir, out_dir=args.out, episode=args.episode, strict=strict, problems=problems
    )
    _report(problems)
    if getattr(args, "video", False):
        from blanket.logs.video import replay_video

        _, episode = load_episode(args.run_dir, args.episode)
        out_dir = args.out if args.out is not None else Path(args.run_dir) / "figures"
        paths.append(
            replay_video(
                args.run_dir,
                episode=episode,
                out=Path(out_dir) / f"episode-{episode:05d}-replay.mp4",
                fps=getattr(args, "fps", 30),
            )
        )
    for path in paths:
        print(path)
    return 0


def add_inspect_parser(subparsers: Any) -> argparse.ArgumentParser:
    """Add ``inspect RUN_DIR [--csv FILE]``."""
    parser = subparsers.add_parser(
        "inspect",
        help="summarise a run folder episode by episode",
        description="Print the run metadata and, per episode, success, time to success, "
        "final error and mean free energy, computed from the logged columns.",
    )
    parser.add_argument("run_dir", type=Path, metavar="RUN_DIR", help="run folder")
    parser.add_argument(
        "--csv", type=Path, default=None, metavar="FILE", help="also write the episode table as CSV"
    )
    parser.add_argument("--strict", action="store_true", help=_STRICT_HELP)
    parser.set_defaults(handler=run_inspect)
    return parser


def run_inspect(args: argparse.Namespace) -> int:
    """Print the summary of ``args.run_dir``. Returns the exit status (0)."""
    from blanket.logs.reader import read_metadata
    from blanket.logs.run_summary import format_summary, summarize_run
    from blanket.logs.schema import LogError

    strict = getattr(args, "strict", False)
    table, problems = summarize_run(args.run_dir, on_error="skip")
    if problems and strict:
        raise problems[0]
    _report(problems)
    if table.empty:
        raise LogError(f"{args.run_dir}: the run holds no rows")
    print(format_summary(table, read_metadata(args.run_dir), args.run_dir))
    csv = getattr(args, "csv", None)
    if csv is not None:
        table.to_csv(csv)
    return 0


def add_logs_parser(subparsers: Any) -> argparse.ArgumentParser:
    """Add ``logs repair RUN_DIR``."""
    parser = subparsers.add_parser(
        "logs",
        help="maintain run folders (repair what an interrupted run left)",
        description="Maintain run folders. Readers (inspect, plot, read_run) never change a "
        "run folder; this is the step that does.",
    )
    actions = parser.add_subparsers(dest="logs_action", metavar="ACTION", required=True)
    repair = actions.add_parser(
        "repair",
        help="finish episode journals and remove temporaries an interrupted run left",
        description="Write the episode file of every journal an interrupted run left (the "
        "journal is removed only after the new file has read back whole and equal), remove "
        "hidden temporaries of processes no longer running, and list episode files that "
        "stay damaged. Running it again changes nothing.",
    )
    repair.add_argument("run_dir", type=Path, metavar="RUN_DIR", help="run folder")
    parser.set_defaults(handler=run_logs)
    return parser


def run_logs(args: argparse.Namespace) -> int:
    """``logs repair``: print one line per action or problem; exit 1 if problems remain."""
    from blanket.logs.repair import repair_run

    report = repair_run(args.run_dir)
    for line in report.lines():
        print(line)
    return 1 if report.problems else 0
