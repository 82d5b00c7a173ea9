"""The ``patchbatch`` command: parses arguments and calls the stages; nothing else.

Exit status: 0 every input analysed (cells failing QC are still a success); 1 some inputs could not
be analysed (the others' results are written); 2 bad usage, bad config, bad sheet or output folder.
"""

from __future__ import annotations

import argparse
import gc
import logging
import sys
from collections.abc import Sequence

from pipeline import __version__
from pipeline.errors import ConfigError, PatchbatchError, RecordingError


def build_parser() -> argparse.ArgumentParser:
    """The argument parser (one sub-command per job)."""
    parser = argparse.ArgumentParser(
        prog="patchbatch",
        description="Batch analysis of whole-cell current-clamp step recordings.",
    )
    parser.add_argument("--version", action="version", version=f"patchbatch {__version__}")
    sub = parser.add_subparsers(dest="command", required=True, metavar="COMMAND")

    run = sub.add_parser("run", help="analyse files and folders; write tables, figures, page")
    run.add_argument("inputs", nargs="+", metavar="INPUT", help="files or folders")
    run.add_argument("-c", "--config", help="TOML config (overrides the defaults it sets)")
    run.add_argument("-o", "--out", default="reports", help="output folder (default: reports)")
    run.add_argument(
        "-j", "--workers", type=int, help="local worker processes (default: all cores)"
    )
    run.add_argument(
        "--scheduler",
        metavar="ADDRESS|local",
        help="run on a Dask cluster: tcp://HOST:PORT, or 'local' to start one here",
    )
    run.add_argument(
        "--sheet", help="metadata sheet (CSV); default: metadata.csv in an input folder"
    )
    run.add_argument("--no-figures", action="store_true", help="write tables and page only")
    run.add_argument("--force", action="store_true", help="replace another run's outputs")
    run.add_argument("-q", "--quiet", action="store_true", help="warnings and errors only")

    inspect = sub.add_parser("inspect", help="show what the readers and step finder see")
    inspect.add_argument("file")
    inspect.add_argument(
        "-c", "--config", help="TOML config (step schedule for files without current)"
    )

    sample = sub.add_parser("sample", help="write the invented demo day into a folder")
    sample.add_argument("dir")

    sub.add_parser("config", help="print the default config, commented")
    return parser


def entry() -> int:
    """The installed ``patchbatch`` command (and ``python -m pipeline``): :func:`main`, then
    a quick exit.

    Returns
    -------
    int
        The exit status.

    Notes
    -----
    Only as a process's last act: it freezes the garbage collector for good, so a
    long-lived program calling it would never collect its cyclic garbage again. Programs
    call :func:`main`.
    """
    status = main()
    # All outputs are written and closed by now. The interpreter's shutdown would run the
    # cyclic garbage collector over every object of scipy, pandas and matplotlib
    # (DEVELOPERS.md, "Where the time goes", gives the cost); frozen, they are left to the
    # operating system. atexit handlers and the flushing of the standard streams still run.
    gc.freeze()
    return status


def main(argv: Sequence[str] | None = None) -> int:
    """Run one ``patchbatch`` command (what :func:`entry` runs, without its quick exit).

    Parameters
    ----------
    argv : sequence of str, optional
        The arguments after the program name; default ``sys.argv[1:]``.

    Returns
    -------
    int
        The exit status (see the module docstring).
    """
    parser = build_parser()
    args = parser.parse_args(argv)
    try:
        return _COMMANDS[args.command](args)
    except ConfigError as exc:
        print(f"patchbatch: config error: {exc}", file=sys.stderr)
        return 2
    except RecordingError as exc:
        print(f"patchbatch: {exc}", file=sys.stderr)
        return 1
    except PatchbatchError as exc:
        print(f"patchbatch: {exc}", file=sys.stderr)
        return 2
    except BrokenPipeError:  # e.g. `patchbatch inspect FILE | head`
        sys.stderr.close()
        return 0
    except KeyboardInterrupt:
        print("patchbatch: interrupted; re-run the same command to resume", file=sys.stderr)
        return 130


def _run(args: argparse.Namespace) -> int:
    from pipeline.batch import run_batch, summary_line
    from pipeline.config import load_config

    if args.workers is not None and args.workers < 1:
        raise ConfigError(f"-j/--workers must be at least 1, got {args.workers}")
    config = load_config(args.config)
    console = _console_logging(args.quiet)
    try:
        result = run_batch(
            args.inputs,
            config,
            args.out,
            sheet=args.sheet,
            workers=args.workers,
            scheduler=args.scheduler,
            figures=False if args.no_figures else None,
            force=args.force,
            progress=None if not args.quiet else False,
        )
    finally:
        logging.getLogger("patchbatch").removeHandler(console)
    if not args.quiet:
        print(f"{summary_line(result.info['counts'])}. Open {args.out}/index.html")
    return result.exit_status


def _inspect(args: argparse.Namespace) -> int:
    from pipeline.config import load_config
    from pipeline.inspection import inspect_file

    config = load_config(args.config)
    print(inspect_file(args.file, config.steps))
    return 0


def _sample(args: argparse.Namespace) -> int:
    from pipeline.sample import write_sample_day

    written = write_sample_day(args.dir)
    print(f"wrote {len(written)} files to {args.dir}")
    return 0


def _config(args: argparse.Namespace) -> int:
    from pipeline.config import default_config_text

    sys.stdout.write(default_config_text())
    return 0


def _console_logging(quiet: bool) -> logging.Handler:
    """Log to the current stderr (progress lines when it is not a terminal)."""
    handler = logging.StreamHandler(sys.stderr)
    handler.setLevel(logging.WARNING if quiet or sys.stderr.isatty() else logging.INFO)
    handler.setFormatter(logging.Formatter("%(levelname)s %(message)s"))
    logger = logging.getLogger("patchbatch")
    logger.setLevel(logging.INFO)
    logger.addHandler(handler)
    return handler


_COMMANDS = {"run": _run, "inspect": _inspect, "sample": _sample, "config": _config}
