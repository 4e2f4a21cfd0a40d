"""Provenance of a run: software version, options, input checksums, date, machine.

Enough to tell later which data and which settings made a result, and to
check that an input file has not changed since (SHA-256, FIPS 180-4).
"""

from __future__ import annotations

import datetime
import hashlib
import os
import platform
import sys
from pathlib import Path

from ..errors import TwinrayInputError

_CHUNK_BYTES = 1 << 20


def sha256_file(path) -> str:
    """Hex SHA-256 of a file's bytes, read in 1 MiB chunks (memory stays flat).

    Parameters
    ----------
    path : path-like

    Returns
    -------
    str
        64 lower-case hexadecimal digits.
    """
    digest = hashlib.sha256()
    with open(path, "rb") as f:
        while True:
            chunk = f.read(_CHUNK_BYTES)
            if not chunk:
                break
            digest.update(chunk)
    return digest.hexdigest()


def input_files(paths) -> list:
    """The files behind the given inputs: a folder study contributes its ``*.parquet`` files.

    Parameters
    ----------
    paths : iterable of path-like or None
        Files or folders; ``None`` entries are skipped.

    Returns
    -------
    list of Path
    """
    files = []
    for p in paths:
        if p is None:
            continue
        p = Path(p)
        if p.is_dir():
            files.extend(sorted(q for q in p.iterdir() if q.suffix == ".parquet" and q.is_file()))
        elif p.is_file():
            files.append(p)
        else:
            raise TwinrayInputError(f"input {p} does not exist (needed for the report's checksums)")
    return files


def machine_description() -> str:
    """Host name, operating system, processor and core count, in one line."""
    cores = os.cpu_count() or 0
    return (f"{platform.node() or 'unknown host'}; {platform.system()} {platform.release()}; "
            f"{platform.machine() or 'unknown processor'}; {cores} cores")


def provenance(command: str = "", options: dict | None = None, inputs=()) -> dict:
    """Facts about this run, for the report and for JSON outputs.

    Parameters
    ----------
    command : str
        What was run, e.g. ``"twinray sinogram study.parquet -o sino.h5"``.
    options : dict, optional
        Option name -> value as used (after defaults).
    inputs : iterable of path-like
        Input files or folders; each file gets its size and SHA-256.

    Returns
    -------
    dict
        ``twinray version``, ``Python``, ``numpy``, ``date (UTC)``,
        ``machine``, ``command``, ``options`` (dict) and ``inputs`` (list of
        ``{"path", "bytes", "sha256"}``).
    """
    import numpy

    from .. import __version__

    files = input_files(inputs)
    return {
        "twinray version": __version__,
        "Python": platform.python_version(),
        "numpy": numpy.__version__,
        "date (UTC)": datetime.datetime.now(datetime.timezone.utc).strftime("%Y-%m-%dT%H:%M:%SZ"),
        "machine": machine_description(),
        "command": command or " ".join(["twinray"] + sys.argv[1:]),
        "options": dict(options or {}),
        "inputs": [{"path": str(f), "bytes": f.stat().st_size, "sha256": sha256_file(f)} for f in files],
    }
