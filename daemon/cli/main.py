"""The ``sigmad`` command line.

Errors go to stderr as one sentence naming the file, field or value at fault;
tracebacks only with ``--debug``. Exit codes: 0 ok, 1 user error (config,
arguments), 2 runtime failure.
"""

from __future__ import annotations

import argparse
import contextlib
import logging
import os
import signal
import sys
import threading
import time

from sigmad.daemon import __version__

EXIT_OK, EXIT_USER, EXIT_RUNTIME = 0, 1, 2


class UserError(Exception):
    """A mistake in what the user asked for: exit code 1, one clear sentence."""


def _cmd_run(args: argparse.Namespace) -> int:
    from sigmad.daemon.app import Daemon
    from sigmad.daemon.config.load import default_config, load_config

    config = load_config(args.config) if args.config else default_config()
    daemon = Daemon(config)
    return serve(daemon)


def serve(daemon, duration: float | None = None, tick=None) -> int:
    """Run a started-or-not daemon until SIGTERM/SIGINT (or ``duration`` seconds)."""
    stop = threading.Event()
    previous = {}
    for sig in (signal.SIGTERM, signal.SIGINT):
        previous[sig] = signal.signal(sig, lambda *_: stop.set())
    try:
        daemon.start()
        deadline = None if duration is None else time.monotonic() + duration
        while not stop.is_set():
            stop.wait(0.2)
            if tick is not None:
                tick()
            if daemon.wait(0):        # the engine thread ended on its own: a failure
                break
            if deadline is not None and time.monotonic() >= deadline:
                break
    finally:
        daemon.stop()
        for sig, handler in previous.items():
            signal.signal(sig, handler)
    if daemon.failure is not None:
        print(f"sigmad: the engine stopped: {daemon.failure}", file=sys.stderr)
        return EXIT_RUNTIME
    return EXIT_OK


def _cmd_validate(args: argparse.Namespace) -> int:
    from pathlib import Path

    from sigmad.daemon.config.describe import describe
    from sigmad.daemon.config.errors import ConfigError
    from sigmad.daemon.config.host import host_problems
    from sigmad.daemon.config.load import config_problems, load_config

    try:
        config = load_config(args.file)
    except ConfigError as first:   # every problem of the text, not only the first
        try:
            text = Path(args.file).read_text(encoding="utf-8")
        except (OSError, UnicodeDecodeError):
            raise first from None
        problems = config_problems(text, args.file) or [first]
        for problem in problems:
            print(f"sigmad: {problem}", file=sys.stderr)
        if len(problems) > 1:
            print(f"sigmad: {len(problems)} problem(s) in {args.file}", file=sys.stderr)
        return EXIT_USER
    problems = host_problems(config)
    for problem in problems:
        print(f"sigmad: {problem}", file=sys.stderr)
    if problems:
        print(f"sigmad: {len(problems)} problem(s) in {args.file} on this host; "
              "nothing was started", file=sys.stderr)
        return EXIT_USER
    print(describe(config))
    return EXIT_OK


def _cmd_send(args: argparse.Namespace) -> int:
    from sigmad.daemon.cli.send import send_stdin

    return send_stdin(args.topic, args.connect, args.field, args.bind, args.socket,
                      follow=args.follow, timeout=args.timeout)


def _cmd_inspect(args: argparse.Namespace) -> int:
    from sigmad.daemon.storage.checkpoint import describe_checkpoint, read_checkpoint

    try:
        cp = read_checkpoint(args.state_file)
    except FileNotFoundError:
        raise UserError(f"no checkpoint at {args.state_file}") from None
    print(describe_checkpoint(cp, args.state_file))
    return EXIT_OK


def _cmd_keygen(args: argparse.Namespace) -> int:
    from pathlib import Path

    from sigmad.daemon.ingest.curve_keys import keygen

    parent = Path(args.dir).absolute().parent
    if not Path(args.dir).is_dir() and not parent.is_dir():
        raise UserError(f"cannot write keys into {args.dir}: its parent directory {parent} "
                        "does not exist; create it first")
    try:
        public, secret = keygen(args.dir, args.name)
    except FileExistsError as exc:
        raise UserError(str(exc)) from None
    except OSError as exc:
        raise UserError(f"cannot write keys into {args.dir} ({exc.strerror}); choose a "
                        "directory this user can write") from None
    print(f"public key {public} (give it to peers), secret key {secret} (mode 0600, keep it)")
    return EXIT_OK


def _cmd_demo(args: argparse.Namespace) -> int:
    from sigmad.daemon.cli.demo import run_demo

    return run_demo(args.duration, args.http)


def _cmd_bench(args: argparse.Namespace) -> int:
    from sigmad.daemon.bench.suite import main as bench_main

    return bench_main(args.quick, args.json)


def build_parser() -> argparse.ArgumentParser:
    p = argparse.ArgumentParser(
        prog="sigmad",
        description="Live weighted moments, least-squares lines and Gaussian mixtures of "
                    "ZeroMQ streams, exported for Prometheus.")
    p.add_argument("--version", action="version", version=f"sigmad {__version__}")
    p.add_argument("--debug", action="store_true", help="show tracebacks on errors")
    p.add_argument("--log-level", default="info",
                   choices=["debug", "info", "warning", "error"])
    sub = p.add_subparsers(dest="command", metavar="COMMAND")

    run = sub.add_parser("run", help="run the daemon")
    run.add_argument("--config", metavar="FILE",
                     help="TOML configuration (default: the embedded one)")
    run.set_defaults(func=_cmd_run)

    demo = sub.add_parser("demo", help="the daemon plus a built-in synthetic producer")
    demo.add_argument("--duration", type=float, metavar="S",
                      help="stop after S seconds (default: until Ctrl-C)")
    demo.add_argument("--http", default="127.0.0.1:9410", metavar="HOST:PORT",
                      help="where to serve the status page and /metrics")
    demo.set_defaults(func=_cmd_demo)

    send = sub.add_parser("send", help="publish values read from stdin "
                                       "(numbers, CSV or JSON lines)")
    send.add_argument("topic")
    send.add_argument("--connect", default="tcp://127.0.0.1:7410", metavar="EP",
                      help="endpoint to connect to (default: the embedded default's PULL)")
    send.add_argument("--bind", action="store_true", help="bind EP instead of connecting")
    send.add_argument("--socket", choices=["push", "pub"], default="push")
    send.add_argument("--field", metavar="F",
                      help="field name for bare numbers (default: the stream's only field)")
    send.add_argument("--follow", action="store_true",
                      help="endless input (tail -f): send each line as it comes, skip and "
                           "count unreadable lines (default: read and check all input "
                           "first, send nothing if a line is unreadable)")
    send.add_argument("--timeout", type=float, default=5.0, metavar="S",
                      help="seconds to wait for the daemon (or, with --socket pub, a "
                           "subscriber) before exiting 1 (default 5)")
    send.set_defaults(func=_cmd_send)

    bench = sub.add_parser("bench", help="end-to-end throughput on this machine, beside "
                                         "the limits it is measured against")
    bench.add_argument("--quick", action="store_true", help="smaller sizes: the same "
                       "verdicts where a figure does not depend on size, none where it does")
    bench.add_argument("--json", metavar="FILE", help="also write the rows as JSON to FILE")
    bench.set_defaults(func=_cmd_bench)

    check = sub.add_parser("validate", help="check a configuration (its text, and its files "
                                            "and addresses on this host) and print it")
    check.add_argument("file")
    check.set_defaults(func=_cmd_validate)

    inspect = sub.add_parser("inspect", help="print a checkpoint's series and estimates")
    inspect.add_argument("state_file", metavar="STATE_FILE")
    inspect.set_defaults(func=_cmd_inspect)

    keygen = sub.add_parser("keygen", help="write a CurveZMQ key pair for authenticated ingest")
    keygen.add_argument("dir", metavar="DIR")
    keygen.add_argument("--name", default="sigmad",
                        help="file name stem: NAME.key and NAME.key_secret (default sigmad)")
    keygen.set_defaults(func=_cmd_keygen)
    return p


def main(argv: list[str] | None = None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    logging.basicConfig(level=args.log_level.upper(),
                        format="%(asctime)s %(levelname)s %(name)s: %(message)s")
    if args.command is None:
        parser.print_help(sys.stderr)
        return EXIT_USER
    from sigmad.daemon.config.errors import ConfigError
    from sigmad.daemon.ingest.source import BindError
    from sigmad.daemon.storage.checkpoint import CheckpointError

    try:
        return args.func(args)
    except (ConfigError, UserError) as exc:
        if args.debug:
            raise
        print(f"sigmad: {exc}", file=sys.stderr)
        return EXIT_USER
    except (CheckpointError, BindError) as exc:   # e.g. a corrupt state with strict_restore
        if args.debug:
            raise
        print(f"sigmad: {exc}", file=sys.stderr)
        return EXIT_RUNTIME
    except BrokenPipeError:   # the reader went away (`sigmad inspect ... | head`): not ours
        with contextlib.suppress(OSError):
            devnull = os.open(os.devnull, os.O_WRONLY)
            os.dup2(devnull, sys.stdout.fileno())   # so the exit's flush cannot fail again
        return EXIT_OK
    except KeyboardInterrupt:
        return EXIT_OK
    except Exception as exc:   # the edge: one sentence, a traceback only with --debug
        if args.debug:
            raise
        print(f"sigmad: {type(exc).__name__}: {exc}", file=sys.stderr)
        return EXIT_RUNTIME


if __name__ == "__main__":
    sys.exit(main())
