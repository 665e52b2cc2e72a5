"""The `upright` command line: parse, call the library, print. Exit codes:
0 ran and stayed up (or every test passed), 1 fell or a test failed,
2 bad input, 3 the controller script failed.

This module is the entry point: the typer app, its --version, and the commands registered in
the order `upright --help` lists them. The commands live in :mod:`sandbox.commands`, one
module per group; what they share (exit codes, the error wrapper, --set parsing, the
progress bar) in :mod:`sandbox.commands.common`, re-exported here.
"""

from __future__ import annotations

from typing import Annotated

import typer

from .commands.analyze import analyze
from .commands.common import (
    EXIT_BAD_INPUT,
    EXIT_CONTROLLER,
    EXIT_FELL,
    EXIT_INTERRUPTED,
    EXIT_OK,
    BadInput,
    _check_workers,
    _controller_label,
    _fail,
    _load_config_file,
    _print_warnings,
    _progress_bar,
    _robot_and_settings,
    _settings_from,
    _split_sets,
    _stderr_is_terminal,
    handles_errors,
    parse_sets,
)
from .commands.fitting import compare, fit
from .commands.many import _ProgressLine, margins, sweep, tune
from .commands.robot import build, inspect
from .commands.running import (
    _check_camera,
    _clipped_text,
    _exit_code,
    _print_run,
    demo,
    render,
    run,
    suite,
)

__all__ = [
    "EXIT_BAD_INPUT", "EXIT_CONTROLLER", "EXIT_FELL", "EXIT_INTERRUPTED", "EXIT_OK", "BadInput",
    "_ProgressLine", "_check_camera", "_check_workers", "_clipped_text", "_controller_label",
    "_exit_code", "_fail", "_load_config_file", "_print_run", "_print_warnings",
    "_progress_bar", "_robot_and_settings", "_settings_from", "_split_sets",
    "_stderr_is_terminal", "app", "handles_errors", "main", "parse_sets",
]

app = typer.Typer(
    name="upright",
    help="Physics sandbox for two-wheeled self-balancing robots: describe, simulate, "
    "analyse, tune.",
    no_args_is_help=True,
    add_completion=False,
    pretty_exceptions_enable=False,
    # Plain help: rich's renderer costs more start-up than all of upright's own imports.
    rich_markup_mode=None,
)


def _hide_flag_types() -> None:
    """Show no type for plain on/off flags in --help (typer labels them ``<bool>``)."""
    from typer.core import TyperOption

    shown = getattr(TyperOption, "display_type_rich", None)
    if shown is None or getattr(shown, "hides_flags", False):
        return  # another typer: leave its help as it is

    def display_type_rich(self, ctx):
        if self.is_flag and self.metavar is None:
            return None
        return shown(self, ctx)

    display_type_rich.hides_flags = True
    TyperOption.display_type_rich = display_type_rich


_hide_flag_types()


def _version(value: bool) -> None:
    if value:
        from . import __version__

        typer.echo(f"upright {__version__}")
        raise typer.Exit()


@app.callback()
def main(
    version: Annotated[
        bool | None,
        typer.Option("--version", callback=_version, is_eager=True, help="Print the version."),
    ] = None,
) -> None:
    """Physics sandbox for two-wheeled self-balancing robots."""


# Registration order is the order `upright --help` lists the commands in.
for _command in (inspect, build, run, suite, render, demo, analyze, sweep, tune, margins, fit,
                 compare):
    app.command()(_command)


if __name__ == "__main__":
    app()
