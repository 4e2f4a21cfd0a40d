"""Atomic output files: write under a temporary name, then rename.

A command never leaves a half-written output under its final name, and never
overwrites one of its own inputs.
"""

from __future__ import annotations

import contextlib
import os
import tempfile
from pathlib import Path

from .errors import TwinrayInputError


def _default_mode() -> int:
    """Permissions of a new file under the current umask (mkstemp makes 0600)."""
    mask = os.umask(0)
    os.umask(mask)
    return 0o666 & ~mask


def publish(tmp_path, final_path) -> None:
    """Give a finished temporary file normal permissions and rename it into place."""
    os.chmod(tmp_path, _default_mode())
    os.replace(tmp_path, final_path)


def refuse_overwriting_inputs(output, inputs) -> None:
    """Raise if ``output`` is the same file as any of ``inputs``.

    Parameters
    ----------
    output : path-like
        The path a command is about to write.
    inputs : iterable of path-like
        Paths the command reads (``None`` entries are skipped).
    """
    out = Path(output).resolve()
    for path in inputs:
        if path is None:
            continue
        p = Path(path).resolve()
        if p == out or (p.is_dir() and p in out.parents and out.suffix == ""):
            raise TwinrayInputError(f"output {output} would overwrite the input {path}; choose another name")


@contextlib.contextmanager
def atomic_path(final_path, suffix: str | None = None):
    """Yield a temporary path next to ``final_path``; rename it there on success.

    On an exception the temporary file is removed and the final name is left
    untouched.

    Parameters
    ----------
    final_path : path-like
        Where the finished file should appear.
    suffix : str, optional
        Suffix of the temporary file (defaults to that of ``final_path``, so
        libraries that look at the extension still work).
    """
    final_path = Path(final_path)
    parent = final_path.parent if str(final_path.parent) else Path(".")
    if not parent.exists():
        raise TwinrayInputError(f"output folder {parent} does not exist")
    if suffix is None:
        suffix = "".join(final_path.suffixes) or ".tmp"
    fd, tmp = tempfile.mkstemp(prefix=f".{final_path.name}.", suffix=".part" + suffix, dir=parent)
    os.close(fd)
    tmp_path = Path(tmp)
    try:
        yield tmp_path
        publish(tmp_path, final_path)
    except BaseException:
        with contextlib.suppress(FileNotFoundError):
            tmp_path.unlink()
        raise
