"""The ``digest`` command line. One short function per subcommand; all work is elsewhere.

Exit codes: 0 success, 1 the run failed (or, for ``status``, something needs attention),
2 bad usage or configuration.
"""

from __future__ import annotations

import argparse
import logging
import sys
from collections.abc import Callable, Sequence
from pathlib import Path
from typing import TYPE_CHECKING

from digest import __version__
from digest.config import load_config
from digest.errors import DigestError

if TYPE_CHECKING:
    from digest.jobs import JobOutcome

log = logging.getLogger("digest.cli")


def main(argv: Sequence[str] | None = None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    from digest.logs import configure_logging

    configure_logging(args.verbose, getattr(args, "log_format", "text"))
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
    parser.add_argument(
        "--log-format", choices=("text", "json"), default="text", help="log lines as text or JSON"
    )
    sub = parser.add_subparsers(dest="command", required=True, metavar="COMMAND")
    for name, (helptext, build, func) in COMMANDS.items():
        command = sub.add_parser(name, help=helptext, description=helptext)
        build(command)
        command.set_defaults(func=func)
    return parser


def _config_argument(parser: argparse.ArgumentParser) -> None:
    parser.add_argument(
        "--config", "-c", type=Path, required=True, metavar="FILE", help="the TOML configuration"
    )


# ---- run, preview, demo -------------------------------------------------------------------


def _run_arguments(parser: argparse.ArgumentParser) -> None:
    _config_argument(parser)
    parser.add_argument("--as-of", metavar="PERIOD", help="period to evaluate (default: latest)")
    parser.add_argument(
        "--out", type=Path, metavar="DIR", help="output folder (default: [output] dir)"
    )
    parser.add_argument(
        "--dry-run",
        action="store_true",
        help="deliver to the local sink under [sink] instead of the relay; the ledger is untouched",
    )


def cmd_run(args: argparse.Namespace) -> int:
    from digest.jobs import default_now, run_job

    config = load_config(args.config)
    outcome = run_job(
        config,
        now=default_now(),
        mode="dry-run" if args.dry_run else "relay",
        as_of=args.as_of,
        out_dir=args.out,
        progress=_progress() if sys.stderr.isatty() else None,
        clock=default_now,
    )
    _report(outcome)
    return 0 if outcome.status != "failed" else 1


def _preview_arguments(parser: argparse.ArgumentParser) -> None:
    _config_argument(parser)
    parser.add_argument("--as-of", metavar="PERIOD", help="period to evaluate (default: latest)")
    parser.add_argument(
        "--out", type=Path, required=True, metavar="DIR", help="folder for .eml/.html/.txt"
    )


def cmd_preview(args: argparse.Namespace) -> int:
    from digest.jobs import default_now, run_job

    config = load_config(args.config)
    outcome = run_job(
        config, now=default_now(), mode="preview", as_of=args.as_of, preview_dir=args.out
    )
    _report(outcome)
    return 0


def _demo_arguments(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("--dir", type=Path, default=Path("demo"), help="demo folder")
    parser.add_argument("--fresh", action="store_true", help="regenerate the demo data")


def cmd_demo(args: argparse.Namespace) -> int:
    from digest import demo_data
    from digest.jobs import default_now, run_job

    config = load_config(args.dir / "config.toml")
    data_dir = config.data.units.parent
    if args.fresh or not (config.data.units.exists() and config.data.values.exists()):
        print(f"generating the invented demo scenario into {data_dir} ...")
        demo_data.generate(data_dir)
    now = default_now()
    outcome = run_job(config, now=now, mode="dry-run", progress=_progress())
    preview = config.output.dir / "preview"
    from digest.jobs import write_previews

    write_previews(outcome.digests, preview)
    _report(outcome)
    print(f"\nopen a digest: {preview}/<address>.html (or .txt, .eml)")
    return 0


def _report(outcome: JobOutcome) -> None:
    from digest.summary import print_digest_table, print_summary

    if outcome.result is not None:
        print_summary(outcome.result, outcome.files)
    print_digest_table(outcome)


def _progress() -> Callable[[str], None]:
    def show(stage: str) -> None:
        print(f"  ... {stage}", file=sys.stderr, flush=True)

    return show


# ---- lint, sink ------------------------------------------------------------------------


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


def _sink_arguments(parser: argparse.ArgumentParser) -> None:
    from digest.sink import add_sink_arguments

    add_sink_arguments(parser)


def cmd_sink(args: argparse.Namespace) -> int:
    from digest.sink import sink_command

    return sink_command(args)


# ---- operations: serve, status, outbox, ack ------------------------------------------------


def _serve_arguments(parser: argparse.ArgumentParser) -> None:
    _config_argument(parser)


def cmd_serve(args: argparse.Namespace) -> int:
    from digest.daemon import serve

    return serve(load_config(args.config))


def cmd_status(args: argparse.Namespace) -> int:
    from digest.jobs import default_now
    from digest.status import status_report

    healthy, lines = status_report(load_config(args.config), default_now())
    print("\n".join(lines))
    return 0 if healthy else 1


def _outbox_arguments(parser: argparse.ArgumentParser) -> None:
    _config_argument(parser)
    parser.add_argument("--retry", metavar="ID", help="queue a failed message again")
    parser.add_argument(
        "--all", action="store_true", help="list sent messages too (default: pending and failed)"
    )


def cmd_outbox(args: argparse.Namespace) -> int:
    from digest.jobs import default_now
    from digest.ledger import Ledger

    config = load_config(args.config)
    with Ledger.open(config.ledger.url) as ledger:
        if args.retry:
            item = ledger.outbox.requeue(args.retry, default_now())
            print(f"queued again: {item.id} to {item.recipient}")
            return 0
        items = ledger.outbox.list()
    shown = [i for i in items if args.all or i.status in ("pending", "sending", "failed")]
    if not shown:
        print("outbox: nothing pending or failed")
    for i in shown:
        error = f"  last error: {i.last_error}" if i.last_error else ""
        print(f"{i.status:<8} {i.id}  to {i.recipient}  tries {i.attempts}{error}")
    return 0


def _ack_arguments(parser: argparse.ArgumentParser) -> None:
    _config_argument(parser)
    parser.add_argument("alert_id", type=int, metavar="ALERT_ID", help="the id shown in digests")
    parser.add_argument("--note", required=True, help="why: e.g. 'verified against the register'")


def cmd_ack(args: argparse.Namespace) -> int:
    from digest.jobs import default_now
    from digest.ledger import Ledger

    config = load_config(args.config)
    with Ledger.open(config.ledger.url) as ledger:
        record = ledger.acknowledge(args.alert_id, default_now(), args.note)
    print(f"acknowledged alert {record.id}: {record.check} at {record.unit}, {record.period}")
    return 0


def _only_config(parser: argparse.ArgumentParser) -> None:
    _config_argument(parser)


def _backtest_arguments(parser: argparse.ArgumentParser) -> None:
    _config_argument(parser)
    parser.add_argument("--from", dest="start", required=True, metavar="P1", help="first period")
    parser.add_argument("--to", dest="end", required=True, metavar="P2", help="last period")
    parser.add_argument(
        "--set",
        dest="sets",
        action="append",
        default=[],
        metavar="TARGET=V1,V2",
        help="values to try: band.<field>=... (every band) or check.<name>.<field>=...; "
        "repeat for a grid of every combination",
    )
    parser.add_argument("--truth", type=Path, metavar="FILE", help="CSV of check,unit,period")
    parser.add_argument(
        "--out", type=Path, metavar="DIR", help="output folder (default: [output] dir/backtest)"
    )


def cmd_backtest(args: argparse.Namespace) -> int:
    from digest.backtest import format_table, parse_set, run_backtest, write_files

    config = load_config(args.config)
    overrides = [parse_set(text) for text in args.sets]
    result = run_backtest(config, args.start, args.end, overrides, truth=args.truth)
    print(format_table(result))
    paths = write_files(result, args.out or config.output.dir / "backtest")
    print("\n" + "\n".join(f"wrote {path}" for path in paths.values()))
    return 0


COMMANDS: dict[
    str,
    tuple[str, Callable[[argparse.ArgumentParser], None], Callable[[argparse.Namespace], int]],
] = {
    "run": ("run the pipeline for one period, queue and send the digests", _run_arguments, cmd_run),
    "preview": (
        "render each digest to .eml, .html and .txt files",
        _preview_arguments,
        cmd_preview,
    ),
    "lint": ("check config, hierarchy, data and recipients", _only_config, cmd_lint),
    "demo": ("generate the invented demo scenario and run on it", _demo_arguments, cmd_demo),
    "sink": ("run the local test mail sink (stores into a Maildir)", _sink_arguments, cmd_sink),
    "serve": ("run the scheduled daemon", _serve_arguments, cmd_serve),
    "status": ("last runs, next run, outbox and open alerts", _only_config, cmd_status),
    "outbox": ("list pending and failed messages; retry one", _outbox_arguments, cmd_outbox),
    "ack": ("acknowledge an alert: no more reminders", _ack_arguments, cmd_ack),
    "backtest": (
        "replay past periods under several settings: alerts per digest, recall",
        _backtest_arguments,
        cmd_backtest,
    ),
}


if __name__ == "__main__":
    raise SystemExit(main())
