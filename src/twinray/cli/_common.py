"""Shared pieces of the subcommands: options, output, errors, progress."""

from __future__ import annotations

import functools
import json
import sys
import time
import traceback

import click

from ..errors import TwinrayInputError


class Run:
    """What a command knows about how it was called (``--json``, ``--quiet``)."""

    def __init__(self, as_json: bool, quiet: bool, debug: bool):
        self.as_json = as_json
        self.quiet = quiet
        self.debug = debug
        self.started = time.perf_counter()

    @property
    def show_progress(self) -> bool:
        """Progress bars only on a terminal, never under --json or --quiet."""
        return not (self.as_json or self.quiet) and sys.stderr.isatty()

    def say(self, text: str = "") -> None:
        """A line of the human summary (stdout); silent under --json or --quiet."""
        if not (self.as_json or self.quiet):
            click.echo(text)

    def warn(self, text: str) -> None:
        """A warning on stderr (also under --json; silent under --quiet)."""
        if not self.quiet:
            click.echo(f"warning: {text}", err=True)

    def finish(self, result: dict) -> None:
        """Print the one JSON object under --json (outputs, accounting, timings, ...)."""
        if self.as_json:
            result = dict(result)
            timings = dict(result.get("timings_s", {}))
            timings.setdefault("total", round(time.perf_counter() - self.started, 4))
            result["timings_s"] = timings
            result.setdefault("outputs", [])
            click.echo(json.dumps(result, sort_keys=True, default=_json_default))


def _json_default(obj):
    import numpy as np

    if isinstance(obj, np.generic):
        return obj.item()
    if isinstance(obj, np.ndarray):
        return obj.tolist()
    return str(obj)


def common_options(func):
    """Add --json, --quiet and --debug; pass a :class:`Run` as ``run``."""

    @click.option("--debug", is_flag=True, help="Show the Python traceback on errors.")
    @click.option("--quiet", "-q", is_flag=True, help="Print nothing but errors.")
    @click.option("--json", "as_json", is_flag=True,
                  help="Print one JSON object (outputs, accounting, timings) instead of the summary.")
    @functools.wraps(func)
    def wrapper(*args, as_json, quiet, debug, **kwargs):
        return func(*args, run=Run(as_json, quiet, debug), **kwargs)

    return wrapper


def progress(run: Run, total=None, desc: str = "", unit: str = "it"):
    """A tqdm progress bar on a terminal, a silent stand-in otherwise."""
    from tqdm import tqdm

    return tqdm(total=total, desc=desc, unit=unit, unit_scale=True, disable=not run.show_progress,
                leave=False, dynamic_ncols=True)


def _one_line(text: str) -> str:
    return " ".join(str(text).split())


def run_cli(group: click.Group, argv: list) -> int:
    """Run a click group, turning every failure into one ``error:`` line."""
    debug = "--debug" in argv
    try:
        group.main(args=argv, prog_name="twinray", standalone_mode=False)
        return 0
    except click.exceptions.Exit as exc:
        return exc.exit_code
    except click.exceptions.Abort:
        click.echo("error: aborted", err=True)
        return 130
    except click.ClickException as exc:
        # Usage errors: one line, plus where to look for help.
        msg = _one_line(exc.format_message())
        ctx = getattr(exc, "ctx", None)
        hint = f" (see '{ctx.command_path} --help')" if ctx is not None else ""
        click.echo(f"error: {msg}{hint}", err=True)
        return 2
    except TwinrayInputError as exc:
        if debug:
            traceback.print_exc()
        click.echo(f"error: {_one_line(exc)}", err=True)
        return 1
    except KeyboardInterrupt:
        click.echo("error: interrupted", err=True)
        return 130
    except MemoryError:
        if debug:
            traceback.print_exc()
        click.echo("error: out of memory; try a smaller --batch-size or fewer replicates", err=True)
        return 1
    except OSError as exc:
        if debug:
            traceback.print_exc()
        where = f" ({exc.filename})" if getattr(exc, "filename", None) else ""
        click.echo(f"error: {_one_line(exc.strerror or exc)}{where}", err=True)
        return 1
    except Exception as exc:  # an internal fault: still one line unless --debug
        if debug:
            traceback.print_exc()
        click.echo(f"error: internal error {type(exc).__name__}: {_one_line(exc)} "
                   "(run again with --debug and report it)", err=True)
        return 70
