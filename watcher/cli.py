"""The ``linewatch`` command.

Heavy modules (numpy, scipy, pandas, apprise, matplotlib) are imported inside
the subcommands, so ``linewatch --help`` stays quick.
"""

from __future__ import annotations

import argparse
import json
import sys
from pathlib import Path

EXIT_OK = 0
EXIT_BAD_INPUT = 2


def _parser() -> argparse.ArgumentParser:
    p = argparse.ArgumentParser(
        prog="linewatch",
        description="Watch production-line measurements for non-random patterns and tell the supervisor.",
        epilog="linewatch is advisory: it is not a safety system or an interlock, and a signal is not proof of a cause.",
    )
    sub = p.add_subparsers(dest="command", metavar="COMMAND")

    c = sub.add_parser("check", help="validate a configuration and show what would be watched")
    c.add_argument("config")
    c.add_argument("--json", action="store_true", help="machine-readable output")

    r = sub.add_parser("replay", help="run the detectors over a whole CSV or JSON-lines file")
    r.add_argument("file")
    r.add_argument("--config", help="read the file as one of this configuration's sources")
    r.add_argument("--source", help="which source of the configuration the file belongs to")
    r.add_argument("--column", action="append", help="watch this column (repeatable); default: every numeric column")
    r.add_argument("--time-column", help="column holding the reading time (ISO 8601 or epoch seconds)")
    r.add_argument("--baseline", type=int, help="readings that form the baseline (default 100)")
    r.add_argument("--state", help="also log the findings into this state folder (SQLite and findings.jsonl)")
    r.add_argument("--json", action="store_true", help="one JSON object per finding on stdout, nothing else")
    return p


def _cmd_check(args: argparse.Namespace) -> int:
    from watcher.check import check_report
    from watcher.config import ConfigError, load_config

    try:
        cfg = load_config(args.config)
    except ConfigError as e:
        for line in e.problems:
            print(line, file=sys.stderr)
        print(f"{args.config}: invalid ({len(e.problems)} problem{'s' if len(e.problems) != 1 else ''})", file=sys.stderr)
        return EXIT_BAD_INPUT
    report = check_report(cfg)
    if args.json:
        print(json.dumps(report, indent=2, default=str))
    else:
        from watcher.check import format_check

        print(format_check(report))
    return EXIT_OK


def _cmd_replay(args: argparse.Namespace) -> int:
    from watcher.config import ConfigError, load_config
    from watcher.log import setup_logging
    from watcher.replay import UnusableInput, config_for_file, format_table, replay_file

    setup_logging()
    path = Path(args.file)
    cfg = None
    if args.config:
        try:
            cfg = load_config(args.config)
        except ConfigError as e:
            for line in e.problems:
                print(line, file=sys.stderr)
            return EXIT_BAD_INPUT
    if args.baseline is not None and args.baseline < 20:
        print(f"--baseline: expected at least 20 readings, got {args.baseline}", file=sys.stderr)
        return EXIT_BAD_INPUT
    try:
        if not path.exists():
            raise UnusableInput(f"{path}: no such file")
        run_cfg, src = config_for_file(path, cfg, source=args.source, columns=args.column,
                                       time_column=args.time_column, baseline=args.baseline)
        result = replay_file(path, run_cfg, src)
    except UnusableInput as e:
        print(f"cannot replay: {e}", file=sys.stderr)
        return EXIT_BAD_INPUT
    if args.state:
        from watcher.store import Store

        store = Store(args.state)
        with store.transaction() as tx:
            store.add_findings(tx, result.findings)
            store.add_quarantined(tx, result.batch.quarantined)
        store.sync_jsonl()
        store.close()
    if args.json:
        out = sys.stdout
        for f in result.findings:
            out.write(json.dumps(f.record()) + "\n")
    else:
        print(format_table(result.findings))
        print(f"\n{result.lines} lines, {result.batch.readings} readings, {len(result.findings)} findings, "
              f"{len(result.batch.quarantined)} lines skipped", file=sys.stderr)
    return EXIT_OK


_COMMANDS = {"check": _cmd_check, "replay": _cmd_replay}


def main(argv: list[str] | None = None) -> int:
    parser = _parser()
    args = parser.parse_args(argv)
    if args.command is None:
        parser.print_help()
        return EXIT_OK
    try:
        return _COMMANDS[args.command](args)
    except KeyboardInterrupt:
        return 130
    except BrokenPipeError:
        return EXIT_OK


if __name__ == "__main__":  # pragma: no cover
    raise SystemExit(main())
