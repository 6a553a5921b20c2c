"""The ``sigmad`` command line."""

from __future__ import annotations

import argparse
import sys

from . import __version__


def build_parser() -> argparse.ArgumentParser:
    p = argparse.ArgumentParser(prog="sigmad", description="streaming-statistics daemon")
    p.add_argument("--version", action="version", version=f"sigmad {__version__}")
    p.add_argument("--debug", action="store_true", help="show tracebacks on errors")
    return p


def main(argv: list[str] | None = None) -> int:
    build_parser().parse_args(argv)
    return 0


if __name__ == "__main__":
    sys.exit(main())
