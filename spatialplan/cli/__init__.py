"""The ``spatialplan`` command. It only parses arguments and calls the library.

Each subcommand lives in its own module of this package and is imported only when used,
so ``spatialplan --help`` stays fast.
"""

from __future__ import annotations

import importlib
import importlib.util
import logging
import sys
from typing import Any

import click

from spatialplan import __version__

__all__ = ["main"]

# subcommand name -> module under spatialplan.cli that defines ``command``
_COMMANDS = {
    "check": "check",
    "plan": "plan",
    "verify": "verify",
    "rotation": "rotation",
    "map": "map",
    "compare": "compare",
    "demo": "demo",
}


class _LazyGroup(click.Group):
    def list_commands(self, ctx: click.Context) -> list[str]:
        return [n for n in _COMMANDS if importlib.util.find_spec(f"spatialplan.cli.{_COMMANDS[n]}")]

    def get_command(self, ctx: click.Context, cmd_name: str) -> click.Command | None:
        mod = _COMMANDS.get(cmd_name)
        if mod is None or importlib.util.find_spec(f"spatialplan.cli.{mod}") is None:
            return None
        return importlib.import_module(f"spatialplan.cli.{mod}").command

    def invoke(self, ctx: click.Context) -> Any:
        """Run the subcommand; user errors become one message and an exit code."""
        from spatialplan.cli._common import handle_errors

        with handle_errors(ctx):
            return super().invoke(ctx)


#: Log level -> the console's message prefix (higher levels print as ``error:``).
_LOG_PREFIX = {"DEBUG": "debug:", "INFO": "note:", "WARNING": "warning:"}


class _Prefixed(logging.Formatter):
    """Log records with the console's message prefixes (``note:``, ``warning:`` ...)."""

    def format(self, record: logging.LogRecord) -> str:
        return f"{_LOG_PREFIX.get(record.levelname, 'error:')} {super().format(record)}"


@click.group(cls=_LazyGroup, context_settings={"help_option_names": ["-h", "--help"]})
@click.version_option(__version__, prog_name="spatialplan")
@click.option("-v", "--verbose", count=True, help="More messages (repeat for debug logging).")
@click.option("-q", "--quiet", is_flag=True, help="Only warnings and errors.")
@click.option("--debug", is_flag=True, help="Show Python tracebacks for errors.")
@click.pass_context
def cli(ctx: click.Context, verbose: int, quiet: bool, debug: bool) -> None:
    """Plan spatially feasible clear-cut harvests that maximise net present value."""
    level = logging.WARNING if quiet else (logging.DEBUG if verbose > 1 else logging.INFO)
    logging.basicConfig(level=level, force=True)
    for handler in logging.getLogger().handlers:
        handler.setFormatter(_Prefixed())
    for noisy in ("pyogrio", "fiona", "rasterio", "matplotlib", "distributed", "PIL", "numexpr"):
        logging.getLogger(noisy).setLevel(max(level, logging.WARNING))
    ctx.obj = {"debug": debug, "quiet": quiet, "verbose": verbose}


def main(argv: list[str] | None = None) -> Any:
    """Entry point of the console script; maps errors to messages and exit codes."""
    from spatialplan.cli._common import run_cli

    return run_cli(cli, argv)


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
