"""The ``pvscan`` click group. Each command lives in its own module and is imported lazily,
so ``pvscan --help`` stays fast and one broken command cannot break the others.

Exit codes (documented in the README):
    0  success
    1  bad input or a failed check (a one-line ``pvscan: error: ...`` on stderr)
    2  usage error (unknown option, missing argument; click's own)
    3  unexpected internal error (a bug: please report it with ``-v`` output)
"""
from __future__ import annotations

import gc
import importlib
import re
from collections.abc import Sequence
from typing import Any

import click

from pvscan import __version__
from pvscan.cli._common import configure_logging

#: Thresholds of Python's cyclic garbage collector in a ``pvscan`` process (CPython's default
#: is (700, 10, 10)). A run builds millions of small containers that live for a stage (GeoJSON
#: documents, object columns, per-module records) and hardly any reference cycles; with the
#: default thresholds the collector ran about 3,400 times, 25 of them over every live object,
#: for 3.3 s CPU of a 35 s inspect of 25,536 modules (0.5 s with these), the same results and
#: peak memory. Set for the process by :func:`main` only: the library leaves it alone.
GC_THRESHOLDS = (20_000, 20, 20)

# command name -> "module:attribute"
COMMANDS = {
    "inspect": "pvscan.cli.inspect:inspect_cmd",
    "simulate": "pvscan.cli.simulate:simulate_cmd",
    "evaluate": "pvscan.cli.evaluate:evaluate_cmd",
    "align": "pvscan.cli.align:align_cmd",
    "report": "pvscan.cli.report:report_cmd",
    "history": "pvscan.cli.history:history_group",
    "fleet": "pvscan.cli.fleet:fleet_cmd",
    "layout": "pvscan.cli.layout:layout_group",
}


#: The global verbosity options; they are also accepted after the subcommand
#: (``pvscan inspect ... -v``, ``pvscan history add ... -q``).
_VERBOSITY = re.compile(r"^(-v+|-q+|--verbose|--quiet)$")


def hoist_verbosity(args: list[str]) -> list[str]:
    """``args`` with the -v/-q options moved before the subcommand, where the group reads
    them; everything after a ``--`` is left alone."""
    args = list(args)
    end = args.index("--") if "--" in args else len(args)
    flags = [a for a in args[:end] if _VERBOSITY.match(a)]
    rest = [a for a in args[:end] if not _VERBOSITY.match(a)]
    return flags + rest + args[end:]


class LazyGroup(click.Group):
    def parse_args(self, ctx: click.Context, args: list[str]) -> list[str]:
        if ctx.parent is None:  # the top-level group: global options anywhere on the line
            args = hoist_verbosity(args)
        return super().parse_args(ctx, args)

    def list_commands(self, ctx: click.Context) -> list[str]:
        return sorted(COMMANDS)

    def get_command(self, ctx: click.Context, cmd_name: str) -> click.Command | None:
        target = COMMANDS.get(cmd_name)
        if target is None:
            return None
        module_name, attr = target.split(":")
        module = importlib.import_module(module_name)
        return getattr(module, attr)


@click.group(cls=LazyGroup, context_settings={"help_option_names": ["-h", "--help"]})
@click.version_option(__version__, prog_name="pvscan")
@click.option("-v", "--verbose", count=True, help="More messages (-vv for debug); also after the command.")
@click.option("-q", "--quiet", count=True, help="Fewer messages (no progress bars); also after the command.")
@click.pass_context
def cli(ctx: click.Context, verbose: int, quiet: int) -> None:
    """pvscan: find, classify and rank faulty PV modules in drone thermal orthomosaics."""
    ctx.ensure_object(dict)
    ctx.obj["verbosity"] = verbose - quiet
    configure_logging(verbose - quiet)


def main(argv: Sequence[str] | None = None) -> Any:
    """Console-script entry point (sets :data:`GC_THRESHOLDS` for the process).

    When the command ends, every object still alive is moved to the collector's permanent
    generation (``gc.freeze``): the interpreter's last collection at exit then has nothing
    to look through (about 0.5 s CPU after an inspect of 25,536 modules); the memory goes
    back to the system with the process.
    """
    gc.set_threshold(*GC_THRESHOLDS)
    try:
        return cli.main(args=argv, prog_name="pvscan")
    finally:
        gc.freeze()


if __name__ == "__main__":  # pragma: no cover
    main()
