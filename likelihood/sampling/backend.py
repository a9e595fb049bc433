"""The chain file: emcee's HDF5 backend layout plus ergofit metadata, written crash-safely.

Steps are appended in emcee's layout (group ``mcmc``: datasets ``chain``, ``log_prob``, ``accepted``;
attributes ``iteration``, ``random_state_*``), so ``emcee.backends.HDFBackend(path, read_only=True)``
reads it; a flush writes the new rows, forces them to disk and only then advances ``iteration``
(see :mod:`likelihood.sampling.driver`). One writer at a time (:class:`RunLock`).
"""
from __future__ import annotations

import json
import os
import time
from dataclasses import dataclass
from typing import Any

import emcee
import h5py
import numpy as np

from ..io import atomic_write
from ..errors import ErgofitError
from .settings import SamplerSettings

#: Name of the chain file inside a run's output folder.
CHAIN_FILENAME = "chain.h5"

_GROUP = "mcmc"  # emcee's HDFBackend default group name
_FORMAT_VERSION = 1


def _h5(path: str, mode: str) -> h5py.File:
    """Open without HDF5's file lock: a reader (a notebook, a summary) holding the chain open
    must never make the running sampler fail. Writers are serialised by :class:`RunLock`."""
    return h5py.File(path, mode, locking=False)


class RunLock:
    """Exclusive lock on the output folder for the duration of a run (``flock`` on the folder).

    The kernel releases it when the process ends, however it ends. No-op where ``fcntl`` is
    unavailable.
    """

    def __init__(self, out_dir: str):
        self.out_dir = out_dir
        self.fd: int | None = None

    def __enter__(self) -> RunLock:
        try:
            import fcntl
        except ImportError:  # pragma: no cover - not POSIX
            return self
        self.fd = os.open(self.out_dir, os.O_RDONLY)
        try:
            fcntl.flock(self.fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except OSError:
            os.close(self.fd)
            self.fd = None
            raise ErgofitError(
                f"another process is running the sampler in {self.out_dir}; wait for it to end "
                "or choose a new output folder"
            ) from None
        return self

    def __exit__(self, *exc) -> None:
        if self.fd is not None:
            os.close(self.fd)  # releases the flock
            self.fd = None


def _chain_error(path: str, reason: str) -> ErgofitError:
    reason = " ".join(str(reason).split())
    return ErgofitError(
        f"cannot read chain file {path}: {reason}; remove it or choose a new output folder"
    )


def _decode(value: Any) -> Any:
    if isinstance(value, bytes):
        return value.decode()
    if isinstance(value, np.ndarray) and value.dtype.kind in "OSU":
        return [v.decode() if isinstance(v, bytes) else str(v) for v in value.tolist()]
    return value


@dataclass
class StoredChain:
    """Everything a resume or a load needs from a chain file."""

    iteration: int
    n_walkers: int
    n_dim: int
    names: list[str]
    labels: list[str]
    bounds: np.ndarray
    config_hash: str
    status: str
    seed: str
    settings: dict
    initial_coords: np.ndarray
    initial_log_prob: np.ndarray
    chain: np.ndarray  # (iteration, n_walkers, n_dim)
    log_prob: np.ndarray  # (iteration, n_walkers)
    random_state: tuple | None  # emcee RandomState state after step `iteration`, if consistent


def read_chain(path: str, with_arrays: bool = True, attempts: int = 3) -> StoredChain:
    """Read a chain file; retried briefly, since a running sampler may be mid-flush."""
    for attempt in range(attempts):
        try:
            return _read_chain_once(path, with_arrays)
        except ErgofitError:
            if attempt == attempts - 1:
                raise
            time.sleep(0.1)
    raise AssertionError("unreachable")


def _read_chain_once(path: str, with_arrays: bool) -> StoredChain:
    try:
        with _h5(path, "r") as f:
            a = f.attrs
            if "ergofit_format" not in a or _GROUP not in f:
                raise _chain_error(path, "not an ergofit chain (missing ergofit attributes)")
            g = f[_GROUP]
            iteration = int(g.attrs["iteration"])
            n_walkers, n_dim = int(g.attrs["nwalkers"]), int(g.attrs["ndim"])
            names = _decode(a["parameter_names"])
            stored = StoredChain(
                iteration=iteration,
                n_walkers=n_walkers,
                n_dim=n_dim,
                names=list(names),
                labels=list(_decode(a["labels"])),
                bounds=np.asarray(a["prior_bounds"], dtype=float).reshape(n_dim, 2),
                config_hash=str(_decode(a["config_hash"])),
                status=str(_decode(a["status"])),
                seed=str(_decode(a["seed"])),
                settings=json.loads(_decode(a["settings"])),
                initial_coords=np.array(f["initial_coords"], dtype=float),
                initial_log_prob=np.array(f["initial_log_prob"], dtype=float),
                chain=np.empty((0, n_walkers, n_dim)),
                log_prob=np.empty((0, n_walkers)),
                random_state=None,
            )
            if g["chain"].shape[0] < iteration or g["log_prob"].shape[0] < iteration:
                raise _chain_error(path, f"datasets shorter than iteration {iteration}")
            if with_arrays and iteration > 0:
                stored.chain = np.array(g["chain"][:iteration], dtype=float)
                stored.log_prob = np.array(g["log_prob"][:iteration], dtype=float)
            if int(g.attrs.get("ergofit_rng_iteration", -1)) == iteration:
                items = sorted((k, v) for k, v in g.attrs.items() if k.startswith("random_state_"))
                if len(items) == 5:
                    v = [item[1] for item in items]
                    stored.random_state = (
                        str(_decode(v[0])), np.asarray(v[1], dtype=np.uint32), int(v[2]),
                        int(v[3]), float(v[4]),
                    )
    except ErgofitError:
        raise
    except (OSError, KeyError, ValueError, TypeError, json.JSONDecodeError) as exc:
        raise _chain_error(path, f"corrupt or not an ergofit chain ({exc})") from None
    if len(stored.names) != n_dim or stored.initial_coords.shape != (n_walkers, n_dim):
        raise _chain_error(path, "inconsistent shapes in the chain file")
    return stored


def create_chain_file(path: str, names, labels, bounds, config_hash: str, settings: dict,
                       seed: str, coords: np.ndarray, log_prob: np.ndarray,
                       random_state: tuple) -> None:
    """Write a new, empty chain file atomically (temp file + rename)."""
    n_walkers, n_dim = coords.shape

    def write(tmp):
        with _h5(tmp, "x") as f:
            f.attrs["ergofit_format"] = _FORMAT_VERSION
            f.attrs["config_hash"] = config_hash
            f.attrs["parameter_names"] = np.array(names, dtype=h5py.string_dtype())
            f.attrs["labels"] = np.array(labels, dtype=h5py.string_dtype())
            f.attrs["prior_bounds"] = np.asarray(bounds, dtype=float)
            f.attrs["settings"] = json.dumps(settings)
            f.attrs["seed"] = seed
            f.attrs["status"] = "running"
            f.create_dataset("initial_coords", data=coords)
            f.create_dataset("initial_log_prob", data=log_prob)
            g = f.create_group(_GROUP)
            g.attrs["version"] = emcee.__version__
            g.attrs["nwalkers"] = n_walkers
            g.attrs["ndim"] = n_dim
            g.attrs["has_blobs"] = False
            g.attrs["iteration"] = 0
            rows = int(max(1, min(256, 2**18 // (8 * n_walkers * n_dim))))
            g.create_dataset("accepted", data=np.zeros(n_walkers))
            g.create_dataset("chain", (0, n_walkers, n_dim), maxshape=(None, n_walkers, n_dim),
                             dtype=float, chunks=(rows, n_walkers, n_dim))
            g.create_dataset("log_prob", (0, n_walkers), maxshape=(None, n_walkers),
                             dtype=float, chunks=(rows, n_walkers))
            _write_random_state(g, random_state, 0)
        _fsync(tmp)

    atomic_write(path, write)


def _write_random_state(g: h5py.Group, random_state: tuple, iteration: int) -> None:
    for i, v in enumerate(random_state):
        key = f"random_state_{i}"
        if key in g.attrs:
            g.attrs.modify(key, v)
        else:
            g.attrs[key] = v
    if "ergofit_rng_iteration" in g.attrs:
        g.attrs.modify("ergofit_rng_iteration", np.int64(iteration))
    else:
        g.attrs["ergofit_rng_iteration"] = np.int64(iteration)


def _fsync(path: str) -> None:
    fd = os.open(path, os.O_RDONLY)
    try:
        os.fsync(fd)
    finally:
        os.close(fd)


def set_root_attrs(path: str, **attrs: Any) -> None:
    with _h5(path, "a") as f:
        for key, value in attrs.items():
            f.attrs[key] = value
    _fsync(path)


class ChainWriter:
    """Buffers steps and appends them to the chain file in crash-safe order."""

    def __init__(self, path: str, iteration: int, accepted: np.ndarray, settings: SamplerSettings):
        self.path = path
        self.iteration = iteration  # steps on disk
        self.accepted = accepted.astype(float)  # per-walker accepted counts, incl. buffer
        self.flush_every = settings.flush_every
        self.flush_seconds = settings.flush_seconds
        self.coords: list[np.ndarray] = []
        self.log_prob: list[np.ndarray] = []
        self.random_state: tuple | None = None
        self.last_flush = time.monotonic()

    def add(self, coords, log_prob, accepted, random_state) -> None:
        self.coords.append(np.array(coords, dtype=float))
        self.log_prob.append(np.array(log_prob, dtype=float))
        self.accepted += accepted
        self.random_state = random_state

    def due(self) -> bool:
        return len(self.coords) >= self.flush_every or (
            self.coords and time.monotonic() - self.last_flush >= self.flush_seconds
        )

    def ensure_capacity(self, n_total: int) -> None:
        with _h5(self.path, "a") as f:
            g = f[_GROUP]
            for name in ("chain", "log_prob"):
                if g[name].shape[0] < n_total:
                    g[name].resize(n_total, axis=0)
        _fsync(self.path)

    def flush(self) -> None:
        """Write the buffer: rows first (forced to disk), the iteration counter last."""
        if not self.coords:
            return
        m = len(self.coords)
        start, stop = self.iteration, self.iteration + m
        with _h5(self.path, "a") as f:
            g = f[_GROUP]
            for name in ("chain", "log_prob"):
                if g[name].shape[0] < stop:
                    g[name].resize(stop, axis=0)
            g["chain"][start:stop] = np.stack(self.coords)
            g["log_prob"][start:stop] = np.stack(self.log_prob)
            g["accepted"][:] = self.accepted
            f.flush()
            _write_random_state(g, self.random_state, stop)
            g.attrs.modify("iteration", np.int64(stop))
        _fsync(self.path)
        self.iteration = stop
        self.coords.clear()
        self.log_prob.clear()
        self.last_flush = time.monotonic()


# --------------------------------------------------------------------------------------------
# Signals: defer SIGINT/SIGTERM to the end of the current step
# --------------------------------------------------------------------------------------------

