"""Atomic file output: nothing ergofit writes is ever left half-written.

Every writer puts its bytes into a temporary file beside the target (same folder, so the final
``os.replace`` is an atomic rename on POSIX file systems) and renames it only when writing has
succeeded; on any error the temporary file is removed and the old target, if any, is untouched.
"""
from __future__ import annotations

import math
import os
import uuid

import numpy as np


def atomic_write(path, write, suffix=".tmp"):
    """Call ``write(tmp_path)`` on a temporary file beside ``path``, then rename it to ``path``."""
    directory, name = os.path.split(os.path.abspath(os.fspath(path)))
    # not mkstemp: its 0600 mode would stick to the output file
    tmp = os.path.join(directory, f".{name}.{os.getpid()}.{uuid.uuid4().hex[:8]}{suffix}")
    try:
        write(tmp)
        os.replace(tmp, path)
    except BaseException:
        if os.path.exists(tmp):
            os.remove(tmp)
        raise


def write_text(path, text):
    """Write a text file (UTF-8) atomically."""
    def write(tmp):
        with open(tmp, "w", encoding="utf-8") as fh:
            fh.write(text)
    atomic_write(path, write)


def cache_folder(cache_dir=None):
    """Folder of the on-disk caches (window matrices, curved-sky templates): ``cache_dir``, or
    $XDG_CACHE_HOME/ergofit, or ~/.cache/ergofit."""
    if cache_dir is not None:
        return os.fspath(cache_dir)
    base = os.environ.get("XDG_CACHE_HOME") or os.path.join(os.path.expanduser("~"), ".cache")
    return os.path.join(base, "ergofit")


def open_atomic(path, write_stream, binary=False):
    """Atomically write ``path`` through ``write_stream(file_object)``."""
    def write(tmp):
        with open(tmp, "wb" if binary else "w", **({} if binary else {"encoding": "utf-8"})) as fh:
            write_stream(fh)
    atomic_write(path, write)


def save_figure(fig, path, dpi=150, tight=True):
    """Save a matplotlib figure atomically; the format follows the file extension."""
    fmt = os.path.splitext(os.fspath(path))[1].lstrip(".").lower() or "png"
    atomic_write(path, lambda tmp: fig.savefig(tmp, format=fmt, dpi=dpi,
                                               bbox_inches="tight" if tight else None), "." + fmt)


def ensure_folder(path, hint="choose another output folder"):
    """Create ``path`` if needed and check it is writable; one-line ErgofitError otherwise."""
    from .errors import ErgofitError
    try:
        os.makedirs(path, exist_ok=True)
    except OSError as exc:
        raise ErgofitError(f"{path}: cannot create output folder ({exc.strerror})") from None
    if not os.access(path, os.W_OK):
        raise ErgofitError(f"{path}: output folder is not writable; {hint}")
    return path


def plain_data(obj):
    """JSON/YAML-safe copy: numpy scalars to floats, non-finite floats to None."""
    if isinstance(obj, dict):
        return {str(k): plain_data(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [plain_data(v) for v in obj]
    if isinstance(obj, np.ndarray):
        return plain_data(obj.tolist())
    if isinstance(obj, (bool, np.bool_)):
        return bool(obj)
    if isinstance(obj, (int, np.integer)):
        return int(obj)
    if isinstance(obj, (float, np.floating)):
        return float(obj) if math.isfinite(obj) else None
    return obj


def read_comment_header(path):
    """(first line, {key: [values]}) of the leading ``# key: value`` lines of a text file.

    Reading stops at the first line that does not start with ``#``; a key given twice keeps
    both values in order. OSError and UnicodeDecodeError propagate (callers name the file).
    """
    header = {}
    with open(path, "r", encoding="utf-8") as fh:
        first = fh.readline()
        lines = [first]
        for line in fh:
            if not line.startswith("#"):
                break
            lines.append(line)
    for line in lines:
        if line.startswith("#"):
            body = line[1:].strip()
            if ":" in body:
                key, _, val = body.partition(":")
                header.setdefault(key.strip(), []).append(val.strip())
    return first.strip(), header


def input_file(path, what):
    """``path`` as a string, or a one-line DataError "PATH: WHAT file not found"."""
    from .errors import DataError
    path = os.fspath(path)
    if not os.path.isfile(path):
        raise DataError(f"{path}: {what} file not found")
    return path
