"""Shared CLI helpers: logging set-up, error handling, progress bars."""
from __future__ import annotations

import contextlib
import functools
import logging
import os
import sys
import traceback
import warnings
from collections.abc import Callable
from pathlib import Path
from typing import Any, ParamSpec, TextIO, TypeVar

import click

from pvscan.errors import PvscanError, PvscanWarning

P = ParamSpec("P")
R = TypeVar("R")
F = TypeVar("F", bound=Callable[..., Any])

EXIT_OK = 0
EXIT_INPUT = 1
EXIT_INTERNAL = 3


def configure_logging(verbosity: int) -> None:
    level = logging.WARNING
    if verbosity >= 2:
        level = logging.DEBUG
    elif verbosity == 1:
        level = logging.INFO
    elif verbosity < 0:
        level = logging.ERROR
    logging.basicConfig(level=level, format="pvscan: %(levelname)s: %(message)s", force=True)
    logging.getLogger("pvscan").setLevel(level)


def pipeline_option(help: str) -> Callable[[F], F]:
    """``--pipeline FILE``: the pipeline settings a command reads (``help`` says which section)."""
    return click.option("--pipeline", "pipeline_path", type=click.Path(dir_okay=False, path_type=Path), help=help)


def overwrite_option(help: str) -> Callable[[F], F]:
    """``--overwrite``: replace an existing output (``help`` says which)."""
    return click.option("--overwrite", is_flag=True, help=help)


def verbosity() -> int:
    ctx = click.get_current_context(silent=True)
    while ctx is not None:
        if ctx.obj and "verbosity" in ctx.obj:
            return ctx.obj["verbosity"]
        ctx = ctx.parent
    return 0


def echo(msg: str = "", *, err: bool = False, level: int = 0) -> None:
    """Print ``msg`` unless the verbosity is below ``level`` (0 = normal, 1 = -v)."""
    if verbosity() >= level:
        click.echo(msg, err=err)


def _show_warning(message: Warning | str, category: type[Warning], filename: str, lineno: int,
                  file: TextIO | None = None, line: str | None = None) -> None:
    if issubclass(category, PvscanWarning):
        click.echo(f"pvscan: warning: {message}", err=True)
    else:
        if verbosity() >= 1:
            click.echo(f"pvscan: warning: {category.__name__}: {message}", err=True)


def handle_errors(func: Callable[P, R]) -> Callable[P, R]:
    """Run a command body; turn PvscanError into a one-line message and exit code 1.

    Errors of the machine rather than of pvscan (a full disk, a permission, a file that GDAL
    or SQLite cannot write) are input errors too: one line naming the file, exit code 1.
    Anything else is a bug: exit code 3.
    """

    @functools.wraps(func)
    def wrapper(*args: P.args, **kwargs: P.kwargs) -> R:
        old = warnings.showwarning
        warnings.showwarning = _show_warning
        try:
            return func(*args, **kwargs)
        except PvscanError as exc:
            msg = " ".join(str(exc).split())
            click.echo(f"pvscan: error: {msg}", err=True)
            sys.exit(EXIT_INPUT)
        except (click.exceptions.Exit, click.ClickException, click.Abort, SystemExit):
            raise
        except KeyboardInterrupt:
            click.echo("pvscan: interrupted; nothing was written", err=True)
            sys.exit(130)
        except BrokenPipeError:  # the reader went away (`pvscan ... | head`): stop quietly
            with contextlib.suppress(OSError):
                os.dup2(os.open(os.devnull, os.O_WRONLY), sys.stdout.fileno())
            sys.exit(EXIT_INPUT)
        except Exception as exc:
            from pvscan.io.outputs import write_failure

            why = write_failure(exc)
            if why is not None:
                # the machine, not pvscan: a full disk, a permission, a file GDAL or SQLite
                # cannot write or read
                name = getattr(exc, "filename", None)
                click.echo(f"pvscan: error: {str(name) + ': ' if name else ''}{' '.join(why.split())}",
                           err=True)
                sys.exit(EXIT_INPUT)
            # a bug: short message, traceback only with -v
            if verbosity() >= 1:
                traceback.print_exc()
            msg = " ".join(str(exc).split())
            click.echo(f"pvscan: internal error: {type(exc).__name__}: {msg} (run with -v for details)",
                       err=True)
            sys.exit(EXIT_INTERNAL)
        finally:
            warnings.showwarning = old

    return wrapper


class Progress:
    """A progress callback ``progress(stage, done, total)`` backed by click progress bars.

    Library code receives this as a plain callable (or None) and never prints itself.
    """

    def __init__(self, enabled: bool = True):
        self.enabled = enabled and verbosity() >= 0 and sys.stderr.isatty()
        self._bars: dict[str, Any] = {}
        self._done: dict[str, int] = {}

    def __call__(self, stage: str, done: int, total: int) -> None:
        if not self.enabled:
            return
        bar = self._bars.get(stage)
        if bar is None:
            bar = click.progressbar(length=max(total, 1), label=f"{stage:<14}", file=sys.stderr,
                                    show_eta=True, show_percent=True)
            bar.__enter__()
            self._bars[stage] = bar
            self._done[stage] = 0
        step = done - self._done[stage]
        if step > 0:
            bar.update(step)
            self._done[stage] = done
        if done >= total:
            bar.__exit__(None, None, None)
            self._bars.pop(stage, None)

    def close(self) -> None:
        for bar in list(self._bars.values()):
            bar.__exit__(None, None, None)
        self._bars.clear()
