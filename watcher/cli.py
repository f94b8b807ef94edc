"""The ``linewatch`` command.

Heavy modules (numpy, scipy, pandas, apprise, matplotlib) are imported inside
the subcommands, so ``linewatch --help`` stays quick.
"""

from __future__ import annotations

import argparse
import json
import os
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
    u = sub.add_parser("run", help="watch the configured sources until stopped (SIGINT or SIGTERM)")
    u.add_argument("config")
    u.add_argument("--stdin", metavar="NAME", help="read the lines of source NAME from standard input")
    u.add_argument("--log-format", choices=("plain", "json"), default="plain", help="log lines on stderr")

    a = sub.add_parser("ack", help="acknowledge an episode: no more escalation alerts for it")
    a.add_argument("config")
    a.add_argument("episode", help="the episode id printed in its alerts")
    a.add_argument("--note", default="", help="what was found or done, for the record and the digest")

    b = sub.add_parser("rebaseline", help="close a characteristic's episodes and learn a new baseline from the next readings")
    b.add_argument("config")
    b.add_argument("characteristic")
    b.add_argument("--note", default="", help="why (e.g. the deliberate process change), for the record")

    s = sub.add_parser("status", help="what has been read and found so far (works while the watcher runs)")
    s.add_argument("config")
    s.add_argument("--json", action="store_true", help="one JSON object on stdout")

    from watcher.demo import add_demo_arguments
    from watcher.digest import add_digest_arguments

    add_digest_arguments(sub.add_parser("digest", help="write the digest of a period (HTML, text, JSON); --send sends it"))
    add_demo_arguments(sub.add_parser("demo", help="watch an invented line for one accelerated shift (about 20 s)"))
    return p


def _load(path: str):
    """The configuration, or None after printing every problem."""
    from watcher.config import ConfigError, load_config

    try:
        return load_config(path)
    except ConfigError as e:
        for line in e.problems:
            print(line, file=sys.stderr)
        return None


def _cmd_check(args: argparse.Namespace) -> int:
    from watcher.check import check_report

    cfg = _load(args.config)
    if cfg is None:
        print(f"{args.config}: invalid", file=sys.stderr)
        return EXIT_BAD_INPUT
    report = check_report(cfg)
    if args.json:
        print(json.dumps(report, indent=2, default=str))
    else:
        from watcher.check import format_check

        print(format_check(report))
    return EXIT_OK


def _cmd_replay(args: argparse.Namespace) -> int:
    from watcher.log import setup_logging
    from watcher.replay import UnusableInput, config_for_file, format_table, replay_file

    setup_logging()
    path = Path(args.file)
    cfg = None
    if args.config:
        cfg = _load(args.config)
        if cfg is None:
            return EXIT_BAD_INPUT
    if args.baseline is not None and args.baseline < 20:
        print(f"--baseline: expected at least 20 readings, got {args.baseline}", file=sys.stderr)
        return EXIT_BAD_INPUT
    try:
        if not path.exists():
            raise UnusableInput(f"{path}: no such file")
        run_cfg, src = config_for_file(path, cfg, source=args.source, columns=args.column,
                                       time_column=args.time_column, baseline=args.baseline)
        sink = _ReplaySink(args.state, args.json)
        try:
            result = replay_file(path, run_cfg, src, on_finding=sink.take)
        finally:
            sink.close()
    except UnusableInput as e:
        print(f"cannot replay: {e}", file=sys.stderr)
        return EXIT_BAD_INPUT
    if args.state:
        from watcher.store import Store

        store = Store(args.state)
        with store.transaction() as tx:
            store.add_quarantined(tx, result.batch.quarantined)
        store.close()
    if not args.json:
        print(format_table(sink.kept))
        print(f"\n{result.lines} lines, {result.batch.readings} readings, {sink.count} findings, "
              f"{len(result.batch.quarantined)} lines skipped", file=sys.stderr)
    return EXIT_OK


class _ReplaySink:
    """Where ``replay`` puts each finding as it becomes final: JSON lines on stdout and the
    ``--state`` store as they come (flat memory on long files); the table keeps them for the end."""

    STORE_EVERY = 1000

    def __init__(self, state: str | None, as_json: bool):
        self.as_json = as_json
        self.kept: list = []
        self.pending: list = []
        self.count = 0
        self.store = None
        if state:
            from watcher.store import Store

            self.store = Store(state)

    def take(self, f) -> None:
        self.count += 1
        if self.as_json:
            sys.stdout.write(json.dumps(f.record()) + "\n")
        else:
            self.kept.append(f)
        if self.store is not None:
            self.pending.append(f)
            if len(self.pending) >= self.STORE_EVERY:
                self._store()

    def _store(self) -> None:
        with self.store.transaction() as tx:
            self.store.add_findings(tx, self.pending)
        self.pending = []

    def close(self) -> None:
        if self.store is not None:
            if self.pending:
                self._store()
            self.store.sync_jsonl()
            self.store.close()
            self.store = None


def _cmd_run(args: argparse.Namespace) -> int:
    from watcher.daemon import AlreadyRunning, Daemon
    from watcher.log import setup_logging

    setup_logging(args.log_format)
    cfg = _load(args.config)
    if cfg is None:
        print(f"{args.config}: not started: the configuration is invalid", file=sys.stderr)
        return EXIT_BAD_INPUT
    if args.stdin and all(s.name != args.stdin for s in cfg.sources):
        print(f"--stdin: no source named {args.stdin!r} in {args.config}", file=sys.stderr)
        return EXIT_BAD_INPUT
    try:
        return Daemon(cfg, stdin=args.stdin).run()
    except AlreadyRunning as e:
        print(f"not started: {e}", file=sys.stderr)
        return EXIT_BAD_INPUT


def _cmd_status(args: argparse.Namespace) -> int:
    from watcher.status import format_status, read_status

    cfg = _load(args.config)
    if cfg is None:
        return EXIT_BAD_INPUT
    try:
        st = read_status(cfg)
    except FileNotFoundError as e:
        print(str(e), file=sys.stderr)
        return EXIT_BAD_INPUT
    print(json.dumps(st, indent=2, default=str) if args.json else format_status(st))
    return EXIT_OK


def _cmd_digest(args: argparse.Namespace) -> int:
    from watcher.digest import run_digest

    return run_digest(args)


def _cmd_demo(args: argparse.Namespace) -> int:
    from watcher.demo import run_demo

    return run_demo(args)


def _cmd_ack(args: argparse.Namespace) -> int:
    from watcher.episodes import acknowledge, ensure_schema
    from watcher.store import Store

    cfg = _load(args.config)
    if cfg is None:
        return EXIT_BAD_INPUT
    if not (cfg.state_dir / "linewatch.sqlite").exists():
        print(f"{cfg.state_dir}: no state database here yet: there is nothing to acknowledge", file=sys.stderr)
        return EXIT_BAD_INPUT
    store = Store(cfg.state_dir)
    try:
        with store.transaction() as c:
            ensure_schema(c)
            ep = acknowledge(c, args.episode, args.note)
            store.add_event(c, "acknowledged", args.episode, args.note)
    except (KeyError, ValueError) as e:
        print(f"not acknowledged: {e.args[0] if e.args else e}", file=sys.stderr)
        return EXIT_BAD_INPUT
    finally:
        store.close()
    print(f"episode {ep.id} ({ep.characteristic}, {ep.pattern}) acknowledged" + (f": {args.note}" if args.note else ""))
    return EXIT_OK


def _cmd_rebaseline(args: argparse.Namespace) -> int:
    from watcher.store import Store

    cfg = _load(args.config)
    if cfg is None:
        return EXIT_BAD_INPUT
    names = [c.name for c in cfg.characteristics]
    if args.characteristic not in names:
        print(f"no characteristic {args.characteristic!r} in {args.config} (known: {', '.join(names)})", file=sys.stderr)
        return EXIT_BAD_INPUT
    store = Store(cfg.state_dir)
    try:
        with store.transaction() as c:
            store.add_command(c, "rebaseline", args.characteristic, args.note)
            store.add_event(c, "rebaseline_requested", args.characteristic, args.note)
    finally:
        store.close()
    print(f"{args.characteristic}: a new baseline will be learnt from the next readings "
          "(the running watcher picks this up within a second; otherwise at its next start)")
    return EXIT_OK


_COMMANDS = {
    "check": _cmd_check, "replay": _cmd_replay, "run": _cmd_run, "status": _cmd_status, "ack": _cmd_ack,
    "rebaseline": _cmd_rebaseline, "digest": _cmd_digest, "demo": _cmd_demo,
}


def main(argv: list[str] | None = None) -> int:
    # Small matrices only (Markov chains of a few hundred states): one BLAS thread is fastest and leaves
    # the other core to the reading path.  Must be set before numpy is first imported.
    for var in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS"):
        os.environ.setdefault(var, "1")
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
