"""The ``digest`` command line. One short function per subcommand; all work is elsewhere.

Exit codes: 0 success, 1 the run failed, 2 bad usage or configuration.
"""

from __future__ import annotations

import argparse
import logging
import sys
from collections.abc import Sequence
from datetime import UTC, datetime
from pathlib import Path

from digest import __version__
from digest.config import load_config
from digest.errors import DigestError

log = logging.getLogger("digest.cli")


def main(argv: Sequence[str] | None = None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    _configure_logging(args.verbose)
    try:
        return int(args.func(args))
    except DigestError as exc:
        log.debug("failure details", exc_info=True)
        print(f"digest: {exc}", file=sys.stderr)
        return exc.exit_code
    except KeyboardInterrupt:
        print("digest: interrupted", file=sys.stderr)
        return 1


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="digest",
        description="Nightly data-quality digests for routine health-facility reports.",
    )
    parser.add_argument("--version", action="version", version=f"digest {__version__}")
    parser.add_argument("-v", "--verbose", action="count", default=0, help="more log output")
    sub = parser.add_subparsers(dest="command", required=True, metavar="COMMAND")

    run = sub.add_parser("run", help="run the pipeline for one period and write its outputs")
    _config_argument(run)
    run.add_argument("--as-of", metavar="PERIOD", help="period to evaluate (default: latest)")
    run.add_argument(
        "--out", type=Path, metavar="DIR", help="output folder (default: [output] dir)"
    )
    run.set_defaults(func=cmd_run)

    lint = sub.add_parser("lint", help="check the config and the data; non-zero on problems")
    _config_argument(lint)
    lint.set_defaults(func=cmd_lint)

    demo = sub.add_parser("demo", help="generate the invented demo scenario and run on it")
    demo.add_argument("--dir", type=Path, default=Path("demo"), help="demo folder (default: demo)")
    demo.add_argument("--fresh", action="store_true", help="regenerate the demo data")
    demo.set_defaults(func=cmd_demo)
    return parser


def _config_argument(parser: argparse.ArgumentParser) -> None:
    parser.add_argument(
        "--config",
        "-c",
        type=Path,
        required=True,
        metavar="FILE",
        help="the TOML configuration file",
    )


def _configure_logging(verbose: int) -> None:
    level = logging.WARNING - 10 * min(verbose, 2)
    logging.basicConfig(level=level, format="%(asctime)s %(levelname)s %(name)s: %(message)s")


# ---- subcommands ------------------------------------------------------------------------


def cmd_run(args: argparse.Namespace) -> int:
    from digest.outputs import write_outputs
    from digest.pipeline import new_run_id, run_pipeline
    from digest.summary import print_summary

    config = load_config(args.config)
    out_dir = args.out or config.output.dir
    run_id = new_run_id(datetime.now(UTC))
    progress = _progress_printer() if sys.stderr.isatty() else None
    result = run_pipeline(config, run_id=run_id, as_of=args.as_of, progress=progress)
    paths = write_outputs(result, out_dir)
    print_summary(result, paths)
    return 0


def cmd_lint(args: argparse.Namespace) -> int:
    from digest.lint import lint

    problems = lint(args.config)
    for line in problems:
        print(line)
    if problems:
        print(f"digest lint: {len(problems)} problem(s)", file=sys.stderr)
        return 1
    print(f"{args.config}: config and data are fine")
    return 0


def cmd_demo(args: argparse.Namespace) -> int:
    from digest import demo_data
    from digest.outputs import write_outputs
    from digest.pipeline import new_run_id, run_pipeline
    from digest.summary import print_summary

    config_path = args.dir / "config.toml"
    config = load_config(config_path)
    data_dir = config.data.units.parent
    if args.fresh or not (config.data.units.exists() and config.data.values.exists()):
        print(f"generating the invented demo scenario into {data_dir} ...")
        demo_data.generate(data_dir)
    run_id = new_run_id(datetime.now(UTC))
    result = run_pipeline(config, run_id=run_id, progress=_progress_printer())
    paths = write_outputs(result, config.output.dir)
    print_summary(result, paths)
    return 0


def _progress_printer():  # type: ignore[no-untyped-def]
    def show(stage: str) -> None:
        print(f"  ... {stage}", file=sys.stderr, flush=True)

    return show


if __name__ == "__main__":
    raise SystemExit(main())
