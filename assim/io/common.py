"""Shared pieces of every writer: atomic replacement and CF global attributes."""

from __future__ import annotations

import contextlib
import datetime as _dt
import os
import tempfile
from collections.abc import Iterable, Iterator
from pathlib import Path

from assim._version import __version__
from assim.caution import CAUTION
from assim.errors import AssimWarning, RunError

CONVENTIONS = "CF-1.8"


@contextlib.contextmanager
def atomic_path(path: str | os.PathLike) -> Iterator[Path]:
    """Yield a temporary path beside ``path``; rename it onto ``path`` when the block ends.

    An interrupted or failed write leaves ``path`` as it was (absent, or the previous
    complete file) and removes the temporary file. The temporary name starts with ``.`` and
    ends with ``.part`` so that it is never taken for a product.

    Raises
    ------
    RunError
        if the folder cannot be created or written.
    """
    path = Path(path)
    try:
        path.parent.mkdir(parents=True, exist_ok=True)
        fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".part", dir=path.parent)
    except OSError as exc:
        raise RunError(f"cannot write here ({exc.strerror})", file=path.parent) from None
    os.close(fd)
    tmp_path = Path(tmp)
    try:
        yield tmp_path
        # mkstemp makes the file private (0600); give it the mode an ordinary write would.
        os.chmod(tmp_path, 0o666 & ~_umask())
        os.replace(tmp_path, path)
    except OSError as exc:
        raise RunError(f"cannot write ({exc.strerror}); earlier output left as it was", file=path) from None
    finally:
        with contextlib.suppress(FileNotFoundError):
            tmp_path.unlink()


def _umask() -> int:
    mask = os.umask(0)
    os.umask(mask)
    return mask


def global_attributes(title: str, *, product: bool = True, **extra: str) -> dict[str, str]:
    """CF-1.8 global attributes for a file written by assim.

    Products (everything but the prepared inputs) carry the caution text.
    """

    now = _dt.datetime.now(_dt.UTC).replace(microsecond=0).isoformat()
    attrs = {
        "Conventions": CONVENTIONS,
        "featureType": "timeSeries",
        "title": title,
        "institution": "assim (research software)",
        "source": f"assim {__version__}",
        "history": f"{now} written by assim {__version__}",
    }
    if product:
        attrs["caution"] = CAUTION
        attrs["comment"] = CAUTION
    attrs.update({k: str(v) for k, v in extra.items()})
    return attrs


# String labels of a dimension are written as auxiliary coordinate variables
# (``basin_id(basin)``, CF-1.8 appendix H.2.1), because a coordinate variable proper must be
# numeric and monotonic; readers turn them back into the string index of the dimension.
LABELS = {
    "basin": "basin_id",
    "threshold": "threshold_name",
    "experiment": "experiment_name",
    "metric": "metric_name",
}

# The dimension order of the products contract; on disk time comes last (CF-1.8 section 2.4).
CONTRACT_ORDER = ("experiment", "basin", "issue_time", "time", "lead", "quantile", "member", "threshold", "metric")


def labels_to_file(ds):
    """Replace string index coordinates (``basin``, ...) by their ``*_id``/``*_name`` labels."""
    for dim, name in LABELS.items():
        if dim in ds.variables and ds[dim].dtype.kind in "OUS":
            var = ds[dim]
            ds = ds.drop_vars(dim).assign_coords({name: (dim, var.values.astype(object), dict(var.attrs))})
    return ds


def labels_from_file(ds):
    """Inverse of :func:`labels_to_file`: the labels become the dimensions' string index."""
    for dim, name in LABELS.items():
        if name in ds.variables and ds[name].dims == (dim,):
            var = ds[name]
            ds = ds.drop_vars(name).assign_coords({dim: (dim, var.values.astype(str).astype(object), dict(var.attrs))})
    return ds


def open_netcdf(path, variables=(), *, any_of=(), order=None, load=False):
    """Open a file written by assim lazily, in the contract's layout.

    String labels become the index of their dimension, dimensions are put in ``order`` when
    given (e.g. :data:`CONTRACT_ORDER`: ``(basin, time, member)``, ``(experiment, basin,
    issue_time, lead, member)``), and ``attrs["product_path"]`` is set.

    Parameters
    ----------
    path : path of the file
    variables : names that must all be present (data variables or coordinates)
    any_of : names of which at least one must be present
    order : dimension names in the wanted order (others follow as stored)
    load : read everything into memory and close the file before returning (readers that
        use the whole file anyway: no handle is left open behind the returned Dataset)

    Raises
    ------
    InputError
        naming the file (and the variable) when it is missing, unreadable or incomplete.
    """
    import xarray as xr

    from assim.errors import InputError

    path = Path(path)
    if not path.is_file():
        raise InputError("file not found", file=path)
    if path.stat().st_size == 0:
        raise InputError("the file is empty", file=path)
    try:
        ds = xr.open_dataset(path, engine="netcdf4")
        if load:
            with ds:
                ds = ds.load()
    except (OSError, ValueError, RuntimeError, KeyError, TypeError) as exc:
        raise InputError(f"cannot read as NetCDF ({type(exc).__name__})", file=path) from None
    ds = labels_from_file(ds)
    for name in variables:
        if name not in ds.variables:
            ds.close()
            raise InputError("expected variable is missing", file=path, variable=name)
    any_of = tuple(any_of)
    if any_of and not any(name in ds.variables for name in any_of):
        ds.close()
        raise InputError("expected one of these variables, found none", file=path, variable=" or ".join(any_of))
    if order:
        ds = ds.transpose(*[d for d in order if d in ds.dims], ...)
    ds.attrs["product_path"] = str(path)
    return ds


@contextlib.contextmanager
def output_lock(path: str | os.PathLike, what: str, written: Iterable[str | os.PathLike] = ()) -> Iterator[Path]:
    """Hold the lock file ``path`` (PID and host) while a command writes ``what``.

    A lock held by a live process on this host, or by any process on another host, is
    refused; a lock whose process is dead on this host (left by a killed run) is stale: it
    is reported through ``warnings`` and replaced, so a killed run never blocks the next.
    Once the lock is held, the temporaries (``.name.*.part``, see :func:`atomic_path`) that a
    killed run left beside the files ``written`` are removed: nobody else writes them now.

    Raises
    ------
    LockError
        naming the lock file and the PID and host of the run holding it.
    """
    import socket
    import warnings

    from assim.errors import LockError

    path = Path(path)
    created = not path.parent.exists()
    try:
        path.parent.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise RunError(f"cannot write here ({exc.strerror})", file=path.parent) from None
    host = socket.gethostname()
    mine = f"{os.getpid()} {host}\n"
    for _ in range(2):
        try:
            fd = os.open(path, os.O_CREAT | os.O_EXCL | os.O_WRONLY, 0o644)
        except FileExistsError:
            try:
                pid_text, _, other = path.read_text().strip().partition(" ")
                pid = int(pid_text)
            except (OSError, ValueError):
                pid, other = -1, host
            if other != host:
                raise LockError(f"{what} is held by pid {pid} on host {other}; remove the lock file "
                                "if that run is dead", file=path) from None
            if pid > 0 and _alive(pid):
                raise LockError(f"{what} is in progress in another run (pid {pid}); wait for it to "
                                "finish", file=path) from None
            warnings.warn(f"{path}: stale lock of pid {pid} (no longer running) replaced", AssimWarning,
                          stacklevel=3)
            with contextlib.suppress(FileNotFoundError):
                path.unlink()
            continue
        except OSError as exc:
            raise RunError(f"cannot write here ({exc.strerror})", file=path.parent) from None
        with os.fdopen(fd, "w") as f:
            f.write(mine)
        break
    else:  # pragma: no cover - another run took the lock between our two attempts
        raise LockError(f"{what} is being started by another run", file=path)
    try:
        for product in map(Path, written):
            if product.parent.is_dir():
                for part in product.parent.glob(f".{product.name}.*.part"):
                    with contextlib.suppress(OSError):
                        part.unlink()
        yield path
    finally:
        with contextlib.suppress(OSError):
            if path.read_text() == mine:
                path.unlink()
        if created:  # a failed first run leaves no empty folder behind
            with contextlib.suppress(OSError):
                path.parent.rmdir()


def _alive(pid: int) -> bool:
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        return True
    return True
