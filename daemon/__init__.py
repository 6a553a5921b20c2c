"""sigmad's daemon: sockets, configuration, routing, export, persistence and the CLI."""

from importlib.metadata import PackageNotFoundError, version

try:
    __version__ = version("sigmad")
except PackageNotFoundError:  # running from a source tree that is not installed
    __version__ = "0.1.0"
