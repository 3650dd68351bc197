"""Provenance of an output: what made it, from what, when and where.

The record is a JSON document stored in the output's global ``provenance``
attribute: package and dependency versions, the resolved workflow (every
default filled in), each input file with its size and SHA-256, the UTC
creation time, the host, the command line and the random seed.  A CF
``history`` line summarises it.
"""

from __future__ import annotations

import datetime as _dt
import json
import platform
import socket
import sys
from importlib import metadata
from pathlib import Path

from .. import __version__
from . import readers as _io

DEPENDENCIES = ("numpy", "scipy", "xarray", "netCDF4", "dask", "distributed", "pandas")


def versions() -> dict:
    """Installed versions of mvkde and its runtime dependencies.

    Returns
    -------
    dict
        Package name -> version string (None when not installed), and ``python``.
    """
    out = {"mvkde": __version__, "python": platform.python_version()}
    for name in DEPENDENCIES:
        try:
            out[name] = metadata.version(name)
        except metadata.PackageNotFoundError:
            out[name] = None
    return out


def describe_inputs(files) -> list[dict]:
    """Path (absolute), size in bytes and SHA-256 of each input file.

    Parameters
    ----------
    files : iterable of path-like

    Returns
    -------
    list of dict
        One ``{"path", "size_bytes", "sha256"}`` per file.
    """
    out = []
    for f in files:
        p = Path(f).resolve()
        out.append({"path": str(p), "size_bytes": p.stat().st_size, "sha256": _io.sha256(p)})
    return out


class InputsInBackground:
    """:func:`describe_inputs` computed in a daemon thread (hashlib and file reads release the GIL).

    A run starts it before its blocks and takes :meth:`result` when writing,
    so the inputs are hashed while the cells are computed.
    """

    def __init__(self, files):
        import threading

        self._files = list(files)
        self._out = None
        self._error = None
        self._thread = threading.Thread(target=self._work, name="mvkde-hash-inputs", daemon=True)
        self._thread.start()

    def _work(self):
        try:
            self._out = describe_inputs(self._files)
        except BaseException as exc:  # re-raised in the caller's thread by result()
            self._error = exc

    def result(self) -> list[dict]:
        """The :func:`describe_inputs` list, once the thread is done.

        Returns
        -------
        list of dict
        """
        self._thread.join()
        if self._error is not None:
            raise self._error
        return self._out


def record(workflow, files, *, command_line=None, extra=None, now=None, inputs=None) -> dict:
    """The provenance dict of a run of ``workflow`` over ``files``.

    Parameters
    ----------
    workflow : Workflow
        The validated workflow.
    files : iterable of path-like
        The input files (hashed).
    command_line : list of str, optional
        The command recorded; ``sys.argv`` when None.
    extra : dict, optional
        More entries, added last.
    now : datetime.datetime, optional
        The creation time (UTC); the current time when None.
    inputs : list of dict, optional
        :func:`describe_inputs` of ``files`` when already computed (:class:`InputsInBackground`).

    Returns
    -------
    dict
    """
    now = now or _dt.datetime.now(_dt.timezone.utc)
    wf_file = None
    if workflow.path is not None and Path(workflow.path).exists():
        p = Path(workflow.path).resolve()
        wf_file = {"path": str(p), "size_bytes": p.stat().st_size, "sha256": _io.sha256(p)}
    rec = {
        "created_utc": now.strftime("%Y-%m-%dT%H:%M:%SZ"),
        "host": socket.gethostname(),
        "platform": platform.platform(),
        "command_line": list(command_line if command_line is not None else sys.argv),
        "software": versions(),
        "workflow_file": wf_file,
        "overrides": list(workflow.overrides),
        "workflow": workflow.to_json(),
        "seed": workflow["estimator"]["seed"],
        "inputs": describe_inputs(files) if inputs is None else inputs,
    }
    if extra:
        rec.update(extra)
    return rec


def to_json(rec: dict) -> str:
    """``rec`` as one line of JSON (values JSON cannot hold written with ``str``).

    Parameters
    ----------
    rec : dict
        A provenance record.

    Returns
    -------
    str
    """
    return json.dumps(rec, indent=None, sort_keys=False, allow_nan=False, default=str)


def history_line(rec: dict) -> str:
    """A CF ``history`` entry: time, then the command.

    Parameters
    ----------
    rec : dict
        A provenance record (:func:`record`).

    Returns
    -------
    str
    """
    cmd = " ".join(rec["command_line"]) or "mvkde"
    return f"{rec['created_utc']}: {cmd} (mvkde {rec['software']['mvkde']})"
