"""Shared pieces of every writer: atomic replacement and CF global attributes."""

from __future__ import annotations

import contextlib
import datetime as _dt
import hashlib
import os
import shutil
import tempfile
import uuid
from collections.abc import Iterable, Iterator, Mapping, Sequence
from pathlib import Path

import numpy as np
import yaml

from assim._version import __version__
from assim.caution import CAUTION
from assim.errors import AssimError, AssimWarning, RunError

CONVENTIONS = "CF-1.8"


@contextlib.contextmanager
def atomic_path(path: str | os.PathLike, commit: FileSet | None = None) -> Iterator[Path]:
    """Yield a temporary path beside ``path``; rename it onto ``path`` when the block ends.

    An interrupted or failed write leaves ``path`` as it was (absent, or the previous
    complete file) and removes the temporary file. The temporary name starts with ``.`` and
    ends with ``.part`` so that it is never taken for a product. With ``commit`` (a
    :class:`FileSet` that ``path`` belongs to) the temporary is the set's, and it is renamed
    only when the whole set is committed.

    Raises
    ------
    RunError
        naming ``path`` if the folder cannot be created or the file cannot be written (a full
        disk, whatever error the NetCDF library turns it into).
    """
    path = Path(path)
    if commit is not None:
        tmp_path = commit.part(path)
        try:
            yield tmp_path
        except (OSError, RuntimeError) as exc:
            if isinstance(exc, RunError) or not _is_write_failure(exc):
                raise
            raise write_failure(exc, path) from None
        return
    tmp_path = _temporary(path)
    try:
        yield tmp_path
        # mkstemp makes the file private (0600); give it the mode an ordinary write would.
        os.chmod(tmp_path, 0o666 & ~_umask())
        os.replace(tmp_path, path)
    except (OSError, RuntimeError) as exc:
        if isinstance(exc, RunError) or not _is_write_failure(exc):
            raise
        raise write_failure(exc, path) from None
    finally:
        with contextlib.suppress(FileNotFoundError):
            tmp_path.unlink()


def _temporary(path: Path) -> Path:
    """A new empty ``.name.*.part`` file beside ``path`` (RunError naming the folder)."""
    try:
        path.parent.mkdir(parents=True, exist_ok=True)
        fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".part", dir=path.parent)
    except OSError as exc:
        raise RunError(f"cannot write here ({exc.strerror})", file=path.parent) from None
    os.close(fd)
    return Path(tmp)


def _is_write_failure(exc: BaseException) -> bool:
    """An OSError, or the RuntimeError the NetCDF/HDF5 library raises when a write fails
    (``NetCDF: HDF error`` on a full disk): a failure of the machine, not a bug."""
    if isinstance(exc, OSError):
        return True
    return isinstance(exc, RuntimeError) and any(w in str(exc) for w in ("NetCDF", "HDF", "errno"))


def write_failure(exc: BaseException, path: str | os.PathLike) -> RunError:
    """The one-line error for a failed write of ``path``: the system's reason and the space
    left on its device (a full disk is the usual cause, whatever the library calls it)."""
    path = Path(path)
    reason = exc.strerror if isinstance(exc, OSError) and exc.strerror else str(exc).strip() or type(exc).__name__
    free = ""
    with contextlib.suppress(OSError):
        folder = next(p for p in (path.parent, *path.parents) if p.exists())
        free = f"; {shutil.disk_usage(folder).free // 1024} kB free on its device"
    return RunError(f"cannot write ({reason}{free}); earlier output left as it was", file=path)


def _fsync(path: Path) -> None:
    fd = os.open(path, os.O_RDONLY)
    try:
        os.fsync(fd)
    finally:
        os.close(fd)


class FileSet:
    """Files that are replaced together or not at all (the prepared layer; a run's product
    and its restart; a forecast and its restart).

    Each member is written to its own temporary (:meth:`part`, or ``atomic_path(path,
    commit=the set)``). When the ``with`` block ends without error, every NetCDF member is
    stamped with the set's global attributes (``set_generation``: one random id shared by
    the members; ``set_members``: their names; the ``attrs`` given, e.g. what the set was made
    from), the members named in ``checksummed`` get the checksum of each variable
    (:func:`variable_digest`, variable attribute :data:`CHECKSUM_ATTR`), each temporary is flushed to
    disk (fsync), and only then are they renamed onto their names, in the order given. A
    failure before the renames (a full disk, a kill) leaves every old member as it was; the
    renames themselves need no space, and a kill between two of them leaves members of two
    generations, which :func:`check_set` refuses.

    Raises
    ------
    RunError
        naming the member that could not be written, with the space left on its device.
    """

    def __init__(self, paths: Iterable[str | os.PathLike], *, checksummed: Iterable[str | os.PathLike] = (),
                 attrs: Mapping[str, str] | None = None, guard=None):
        self.guard = guard
        self.paths = [Path(p) for p in paths]
        self.checksummed = {Path(p) for p in checksummed}
        self.generation = uuid.uuid4().hex
        self.attrs = {k: str(v) for k, v in (attrs or {}).items()}
        self._parts: dict[Path, Path] = {}

    def part(self, path: str | os.PathLike) -> Path:
        """The temporary of member ``path`` (created empty on first use)."""
        path = Path(path)
        if path not in self.paths:
            raise ValueError(f"{path} is not a member of this file set")
        if path not in self._parts:
            self._parts[path] = _temporary(path)
        return self._parts[path]

    def __enter__(self) -> FileSet:
        return self

    def __exit__(self, exc_type, exc, tb):
        try:
            if exc_type is None:
                self._commit()
        finally:
            for tmp in self._parts.values():
                with contextlib.suppress(FileNotFoundError):
                    tmp.unlink()
        if exc_type is not None and issubclass(exc_type, OSError | RuntimeError) and not isinstance(exc, RunError) \
                and _is_write_failure(exc):
            raise write_failure(exc, self.paths[0]) from None
        return False

    def _commit(self) -> None:
        missing = [p for p in self.paths if p not in self._parts]
        if missing:  # a bug: every member is written before the set ends
            raise RuntimeError(f"file set committed without {', '.join(map(str, missing))}")
        names = " ".join(p.name for p in self.paths)
        stamp = {"set_generation": self.generation, "set_members": names, **self.attrs}
        for path in self.paths:
            tmp = self._parts[path]
            try:
                if path.suffix == ".nc":
                    _set_global_attributes(tmp, stamp, file_digests(tmp) if path in self.checksummed else {})
                os.chmod(tmp, 0o666 & ~_umask())
                _fsync(tmp)
            except (OSError, RuntimeError) as exc:
                if not _is_write_failure(exc):
                    raise
                raise write_failure(exc, path) from None
        with self.guard() if self.guard is not None else contextlib.nullcontext():
            for path in self.paths:
                try:
                    os.replace(self._parts[path], path)
                except OSError as exc:
                    raise write_failure(exc, path) from None
        with contextlib.suppress(OSError):
            for folder in {p.parent for p in self.paths}:
                _fsync(folder)


def _set_global_attributes(path: Path, attrs: Mapping[str, str], checksums: Mapping[str, str] | None = None) -> None:
    import netCDF4
    from xarray.backends.netCDF4_ import NETCDF4_PYTHON_LOCK

    with NETCDF4_PYTHON_LOCK, netCDF4.Dataset(path, "a") as nc:
        nc.setncatts(dict(attrs))
        bounds = {getattr(v, "bounds", None) for v in nc.variables.values()}
        for name, digest in (checksums or {}).items():
            nc.variables[name].setncattr(BOUNDS_CHECKSUM_ATTR if name in bounds else CHECKSUM_ATTR, digest)


# ------------------------------------------------------------------------ checksums, sets

#: Variable attribute holding the checksum of the variable's values, ``"<split>:<sha256>"``
#: (see :func:`variable_digest`). Files written before it (with the global attribute
#: :data:`LEGACY_CHECKSUM_ATTR`, or with none) are read without a check.
CHECKSUM_ATTR = "sha256"
#: The same on a boundary variable (e.g. ``time_bnds``): CF 1.8 section 7.1 asks that an
#: attribute a boundary variable shares with its parent have the parent's value.
BOUNDS_CHECKSUM_ATTR = "bounds_sha256"
LEGACY_CHECKSUM_ATTR = "sha256_variables"


def _canonical(values, dtype=None) -> np.ndarray:
    """The values as the file holds them: cast to the stored ``dtype`` (what the NetCDF
    library does on write), every NaN the one NaN (fill values decode to it)."""
    a = np.asarray(values)
    if dtype is not None and a.dtype != dtype and a.dtype.kind in "fiub":
        a = a.astype(dtype)
    if a.dtype.kind in "fc":
        nan = np.isnan(a)
        if nan.any():
            a = a.copy()
            a[nan] = np.nan
    return a


def unit_digests(values, n_split: int = 0, dtype=None) -> list[bytes]:
    """SHA-256 of each unit of ``values``: the units are the index combinations of its first
    ``n_split`` axes (the split dimensions, moved first), each unit's values in C order over
    the remaining axes (the file's order); strings joined by NUL."""
    a = _canonical(values, dtype)
    if a.dtype.kind in "OUS":
        rows = a.reshape(int(np.prod(a.shape[:n_split], dtype=np.int64)), -1)
        return [hashlib.sha256("\x00".join(map(str, r.tolist())).encode("utf-8", "surrogatepass")).digest()
                for r in rows]
    rows = np.ascontiguousarray(a).reshape(int(np.prod(a.shape[:n_split], dtype=np.int64)), -1)
    return [hashlib.sha256(r).digest() for r in rows]


def combine_digests(kind: str, shape, split: Sequence[str], units: Iterable[bytes]) -> str:
    """``"<split>:<hex>"``: SHA-256 over the kind of values (``a.dtype.str``, or ``str`` for
    text), the shape and split dimensions, and the unit digests in C order of the split
    dimensions."""
    h = hashlib.sha256(f"{kind}{tuple(int(n) for n in shape)}{','.join(split)}".encode())
    for u in units:
        h.update(u)
    return f"{','.join(split)}:{h.hexdigest()}"


def _kind(a: np.ndarray) -> str:
    return "str" if a.dtype.kind in "OUS" else a.dtype.str


def variable_digest(var, split: Sequence[str] = (), block: int = 366) -> str:
    """Checksum of an xarray variable, as :data:`CHECKSUM_ATTR` records it.

    The one rule of every checksum assim writes: the values (as ``xr.open_dataset`` decodes
    them, in the file's dimension order) are cut into units along the ``split`` dimensions;
    each unit is hashed (:func:`unit_digests`) and the unit digests, in order, are hashed
    with the variable's kind and shape (:func:`combine_digests`). A file written whole
    uses no split (one unit); a file streamed in time blocks splits by its time-like
    dimensions (:class:`StreamDigest`), so the checksum does not depend on how the writes
    were cut, and a reader needs only one block in memory at a time."""
    split = tuple(split)
    shape = tuple(var.shape)
    if not split:
        a = np.asarray(var.values)
        return combine_digests(_kind(a), shape, split, unit_digests(a))
    first = split[0]
    units: list[bytes] = []
    kind = None
    for i in range(0, var.sizes[first], block):
        part = np.asarray(var.isel({first: slice(i, i + block)}).transpose(*split, ...).values)
        kind = kind or _kind(part)
        units += unit_digests(part, len(split))
    if kind is None:  # an empty dimension
        kind = _kind(np.asarray(var.isel({first: slice(0, 0)}).values))
    return combine_digests(kind, shape, split, units)


class StreamDigest:
    """The checksum of one variable written in pieces (by time blocks, in any order, a
    piece written again replacing the earlier one): the digest of each unit (one index of
    each ``split`` dimension) is kept as it is written, and combined at the end
    (:meth:`result`), the same as :func:`variable_digest` of the finished file.

    Parameters
    ----------
    dims, shape, dtype : the variable's dimensions, shape and stored dtype
    split : the dimensions its writes are cut along (a subset of ``dims``, in their order)
    """

    def __init__(self, dims: Sequence[str], shape, dtype, split: Sequence[str]):
        self.split = tuple(split)
        self.dtype = np.dtype(dtype)
        self.shape = tuple(int(n) for n in shape)
        split_shape = tuple(self.shape[list(dims).index(d)] for d in self.split)
        self.units = np.zeros((*split_shape, 32), dtype=np.uint8)
        self.done = np.zeros(split_shape, dtype=bool)

    def add(self, index: tuple, values) -> None:
        """Values of the units ``index`` (an int or a slice per split dimension) with the
        split dimensions first (a slice keeps its axis, an int has none), the others in
        the file's order."""
        target = self.units[index]
        digests = unit_digests(values, target.ndim - 1, self.dtype)
        self.units[index] = np.frombuffer(b"".join(digests), dtype=np.uint8).reshape(target.shape)
        self.done[index] = True

    def missing(self) -> np.ndarray:
        """(k, n_split) indices of the units never written (the file holds fill values there)."""
        return np.argwhere(~self.done)

    def result(self) -> str:
        units = self.units.reshape(-1, 32)
        return combine_digests(self.dtype.str, self.shape, self.split, (u.tobytes() for u in units))


def file_digests(path: str | os.PathLike) -> dict[str, str]:
    """:data:`CHECKSUM_ATTR` of every variable of a file written whole (no split)."""
    import xarray as xr

    with xr.open_dataset(path, engine="netcdf4") as ds:
        return {str(name): variable_digest(ds.variables[name]) for name in ds.variables}


def verify_digests(ds, path, error: type[AssimError] | None = None, names: Iterable[str] | None = None) -> None:
    """Refuse a damaged file: each variable of ``ds`` (as decoded by ``xr.open_dataset``,
    before any change) named in ``names`` (default: all) that carries a
    :data:`CHECKSUM_ATTR` must still have it. A variable written without one (a file of an
    older version, another tool) is accepted as it is. The checksum attributes are then
    dropped from ``ds`` (they describe the file, not values derived from it).

    Raises
    ------
    InputError (or ``error``)
        naming the file and the first variable whose values changed.
    """
    from assim.errors import InputError

    wanted = set(ds.variables) if names is None else set(names) & set(ds.variables)
    for name in sorted(map(str, wanted)):
        var = ds.variables[name]
        recorded = var.attrs.get(CHECKSUM_ATTR, var.attrs.get(BOUNDS_CHECKSUM_ATTR))
        if recorded is None:
            continue
        split = tuple(d for d in str(recorded).partition(":")[0].split(",") if d)
        if not set(split) <= set(var.dims) or variable_digest(var, split) != str(recorded):
            raise (error or InputError)(
                "the file is damaged: the values no longer match the checksum written with them; "
                "write it again (rerun the step that made it)", file=path, variable=name)
    for var in ds.variables.values():
        var.attrs.pop(CHECKSUM_ATTR, None)
        var.attrs.pop(BOUNDS_CHECKSUM_ATTR, None)
    ds.attrs.pop(LEGACY_CHECKSUM_ATTR, None)


def check_set(members: Mapping[str | os.PathLike, Mapping], error: type[AssimError] | None = None) -> None:
    """Refuse a mixed file set: every member that records a ``set_generation`` (see
    :class:`FileSet`) must record the same one. ``members`` maps each file to its global
    attributes; files written outside a set (no ``set_generation``) are not compared.

    Raises
    ------
    InputError (or ``error``)
        naming the files of two different writes.
    """
    from assim.errors import InputError

    seen = [(Path(p), str(a["set_generation"]), str(a.get("history", ""))) for p, a in members.items()
            if a.get("set_generation")]
    for p, gen, history in seen[1:]:
        p0, gen0, history0 = seen[0]
        if gen != gen0:
            raise (error or InputError)(
                f"{p0.name} and {p.name} come from different writes ({_when(history0)} and {_when(history)}): "
                "the set was replaced only in part (an interrupted or failed write); write it again",
                file=p, variable="set_generation")


def _when(history: str) -> str:
    return history.split(" ")[0] if history else "unknown time"


def set_siblings(path: str | os.PathLike, attrs: Mapping) -> dict[Path, dict]:
    """Global attributes of ``path`` and of the other members of its set that exist beside
    it (``set_members``), for :func:`check_set`; only the headers are read."""
    import netCDF4
    from xarray.backends.netCDF4_ import NETCDF4_PYTHON_LOCK

    path = Path(path)
    out = {path: dict(attrs)}
    for name in str(attrs.get("set_members", "")).split():
        other = path.parent / name
        if name == path.name or not other.is_file():
            continue
        try:
            with NETCDF4_PYTHON_LOCK, netCDF4.Dataset(other) as nc:
                out[other] = {k: nc.getncattr(k) for k in nc.ncattrs()}
        except (OSError, RuntimeError):
            continue  # unreadable: its own reader says so when it is read
    return out


def _umask() -> int:
    mask = os.umask(0)
    os.umask(mask)
    return mask


def attribute_values(attrs) -> dict:
    """NetCDF attribute values: numbers stay numbers (so a reader gets 16, not "16"),
    anything else becomes text."""
    def value(v):
        if isinstance(v, bool) or not isinstance(v, int | float | np.integer | np.floating):
            return str(v)
        return v

    return {k: value(v) for k, v in attrs.items()}


def global_attributes(title: str, *, product: bool = True, feature_type: str | None = "timeSeries",
                      **extra) -> dict:
    """CF-1.8 global attributes for a file written by assim.

    Products (everything but the prepared inputs) carry the caution text, once. Numbers in
    ``extra`` stay numbers; anything else is stored as text. ``feature_type`` None: not a
    discrete sampling geometry (a restart holds one instant).
    """

    now = _dt.datetime.now(_dt.UTC).replace(microsecond=0).isoformat()
    attrs = {
        "Conventions": CONVENTIONS,
        **({"featureType": feature_type} if feature_type else {}),
        "title": title,
        "institution": "assim (research software)",
        "source": f"assim {__version__}",
        "history": f"{now} written by assim {__version__}",
    }
    if product:
        attrs["caution"] = CAUTION
    attrs.update(attribute_values(extra))
    return attrs


# String labels of a dimension (basin ids, threshold, experiment and metric names) are stored
# as a string variable named like the dimension, ``basin(basin)`` with ``cf_role:
# timeseries_id``, so that ``xr.open_dataset(p).sel(basin="id")`` works on every file. The
# netCDF-4 data model allows string coordinate variables; CF-1.8 section 1.3 still calls a
# coordinate variable numeric (a mismatch with netCDF-4 raised in CF issue 174), and
# compliance-checker 5 reports no failure for them (its monotonicity check of coordinate
# variables raises on strings and is skipped). Files written before kept the labels as
# ``basin_id(basin)``, ...: readers still accept those.
LABELS = ("basin", "threshold", "experiment", "metric", "parameter", "period")
_EARLIER_LABELS = {"basin": "basin_id", "threshold": "threshold_name", "experiment": "experiment_name",
                   "metric": "metric_name", "parameter": "parameter_name", "period": "period_name"}

def labels_to_file(ds):
    """String labels of the dimensions as variable-length strings (netCDF-4 ``string``)."""
    for dim in LABELS:
        if dim in ds.variables and ds[dim].dtype.kind in "OUS":
            var = ds[dim]
            ds = ds.assign_coords({dim: (dim, var.values.astype(str).astype(object), dict(var.attrs))})
    return ds


def labels_from_file(ds):
    """The dimensions' string labels as str; labels of files written before under their own
    name (``basin_id(basin)``, ...) become the dimension's index."""
    for dim, name in _EARLIER_LABELS.items():
        if name in ds.variables and ds[name].dims == (dim,):
            var = ds[name]
            ds = ds.drop_vars(name).assign_coords({dim: (dim, var.values.astype(str).astype(object), dict(var.attrs))})
    return ds


def open_netcdf(path, variables=(), *, any_of=(), order=None, load=False, verify=None):
    """Open a file written by assim lazily, in the contract's layout.

    String labels become the index of their dimension, dimensions are put in ``order`` when
    given, and ``attrs["product_path"]`` is set. The variables read are checked against the
    checksums written with them (:func:`verify_digests`), before any change.

    Parameters
    ----------
    path : path of the file
    variables : names that must all be present (data variables or coordinates)
    any_of : names of which at least one must be present
    order : dimension names in the wanted order (others follow as stored); None keeps the
        order on disk, which is each product's one order
    load : read everything into memory and close the file before returning (readers that
        use the whole file anyway: no handle is left open behind the returned Dataset)
    verify : names of the variables to check against their checksums; default: every
        variable when ``load`` (all are read), none otherwise (a file just written, opened
        lazily to be returned)

    Raises
    ------
    InputError
        naming the file (and the variable) when it is missing, unreadable, incomplete or
        damaged (its values no longer match their checksums).
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
    try:
        verify_digests(ds, path, names=(None if load else ()) if verify is None else verify)
    except (OSError, ValueError, RuntimeError) as exc:  # a chunk that no longer decompresses
        ds.close()
        raise InputError(f"cannot read as NetCDF ({type(exc).__name__}): the file is damaged; write it again",
                         file=path) from None
    except AssimError:
        ds.close()
        raise
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
    """Hold the lock file ``path`` (PID, host and the process's start time) while a command
    writes ``what``.

    A lock held by a live process on this host, or by any process on another host, is
    refused; a lock whose process is dead on this host (left by a killed run), or whose PID
    now belongs to another process (same PID, another start time: the PID was reused after
    the run died), is stale: it is reported through ``warnings`` and replaced, so a killed
    run never blocks the next. Once the lock is held, the temporaries (``.name.*.part``, see
    :func:`atomic_path`) that a killed run left beside the files ``written`` are removed:
    nobody else writes them now.

    Raises
    ------
    LockError
        naming the lock file and the PID and host of the run holding it, or when the lock
        path is not a plain file.
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
    mine = f"{os.getpid()} {host} {_start_time(os.getpid())}\n"
    for _ in range(2):
        if path.is_dir() or (path.exists() and not path.is_file()):
            raise LockError(f"the lock path of {what} is not a plain file; remove it", file=path)
        try:
            fd = os.open(path, os.O_CREAT | os.O_EXCL | os.O_WRONLY, 0o644)
        except FileExistsError:
            try:
                pid_text, other, started = (path.read_text().split() + ["", ""])[:3]
                pid = int(pid_text)
            except (OSError, ValueError):
                pid, other, started = -1, host, ""
            if other != host:
                raise LockError(f"{what} is held by pid {pid} on host {other}; remove the lock file "
                                "if that run is dead", file=path) from None
            if pid > 0 and _holder_alive(pid, started):
                raise LockError(f"{what} is in progress in another run (pid {pid}); wait for it to "
                                "finish", file=path) from None
            why = "no longer running" if pid <= 0 or not _alive(pid) else "its PID now belongs to another process"
            warnings.warn(f"{path}: stale lock of pid {pid} ({why}) replaced", AssimWarning, stacklevel=3)
            try:
                path.unlink()
            except FileNotFoundError:
                pass
            except OSError as exc:
                raise RunError(f"cannot remove the stale lock ({exc.strerror})", file=path) from None
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
    except OverflowError:
        return False
    return True


def _start_time(pid: int) -> str:
    """The start time of process ``pid`` in clock ticks since boot (field 22 of
    ``/proc/PID/stat``, proc(5)); "" where there is no /proc."""
    try:
        with open(f"/proc/{pid}/stat", encoding="ascii", errors="replace") as f:
            stat = f.read()
    except OSError:
        return ""
    fields = stat[stat.rfind(")") + 2:].split()  # the command name may hold spaces and ")"
    return fields[19] if len(fields) > 19 else ""


def _holder_alive(pid: int, started: str) -> bool:
    """Is the run that wrote a lock (``pid``, its start time) still running? A live process
    with the same PID but another start time, or (for a lock that records no start time) one
    whose command line does not name assim, is not that run: the PID was reused."""
    if not _alive(pid):
        return False
    now = _start_time(pid)
    if started and now:
        return started == now
    try:  # a lock without a start time (an older version): is that process assim at all?
        with open(f"/proc/{pid}/cmdline", "rb") as f:
            return b"assim" in f.read()
    except OSError:
        return True  # no /proc: a live PID is taken as the holder


@contextlib.contextmanager
def layer_lock(folder: str | os.PathLike, *, exclusive: bool, timeout: float = 600.0) -> Iterator[None]:
    """Readers and the writer of a layer (the prepared folder) never interleave.

    Readers (runs, hindcasts, forecasts, ``check``) hold a shared lock while they use the
    layer; ``prep`` holds the exclusive lock while it replaces the files (the renames of its
    :class:`FileSet`), so a reader never sees half a layer. The lock is ``flock(2)`` on the
    file ``.layer.lock`` in the folder: the system releases it when its process dies, so it
    is never stale. Waits at most ``timeout`` seconds. A folder that does not exist or in
    which the lock file cannot be made (a read-only copy nobody writes) is not locked.

    Raises
    ------
    LockError
        when the lock is not had within ``timeout`` (naming the lock file).
    """
    import fcntl
    import time

    from assim.errors import LockError

    path = Path(folder) / ".layer.lock"
    try:
        fd = os.open(path, os.O_RDWR | os.O_CREAT, 0o644)
    except OSError:
        try:
            fd = os.open(path, os.O_RDONLY)
        except OSError:
            yield
            return
    try:
        mode = fcntl.LOCK_EX if exclusive else fcntl.LOCK_SH
        deadline = time.monotonic() + timeout
        while True:
            try:
                fcntl.flock(fd, mode | fcntl.LOCK_NB)
                break
            except BlockingIOError:
                if time.monotonic() >= deadline:
                    who = "read by another run" if exclusive else "being replaced by `assim prep`"
                    raise LockError(f"the prepared layer is {who}; gave up after {timeout:.0f} s",
                                    file=path) from None
                time.sleep(0.05)
            except OSError:
                break  # a file system without flock: nothing to hold
        yield
    finally:
        os.close(fd)


# ---------------------------------------------------------------------------------- YAML


class DuplicateKeyError(yaml.constructor.ConstructorError):
    """A mapping key given twice in one YAML document (the line of the first and the mark of
    the second)."""

    def __init__(self, key, first_line: int, mark):
        super().__init__(None, None, f"key {key!r} given twice (first on line {first_line})", mark)
        self.key = key


class YamlLoader(yaml.SafeLoader):
    """The one YAML loader of the project (config files, ``--set`` values, basins.yaml): the
    safe subset, with a key given twice in one mapping refused (PyYAML keeps the last one
    silently) and dates left as text (``2012-06-30`` is the string the schema expects)."""

    def construct_mapping(self, node, deep=False):
        if isinstance(node, yaml.MappingNode):
            seen: dict = {}
            for key_node, _ in node.value:
                if key_node.tag == "tag:yaml.org,2002:merge":  # `<<: *anchor` may be overridden
                    continue
                key = self.construct_object(key_node, deep=True)
                try:
                    if key in seen:
                        raise DuplicateKeyError(key, seen[key], key_node.start_mark)
                    seen[key] = key_node.start_mark.line + 1
                except TypeError:  # an unhashable key: SafeLoader says so itself
                    continue
        return super().construct_mapping(node, deep=deep)


YamlLoader.yaml_implicit_resolvers = {
    ch: [(tag, rx) for tag, rx in rules if tag != "tag:yaml.org,2002:timestamp"]
    for ch, rules in yaml.SafeLoader.yaml_implicit_resolvers.items()
}


def load_yaml(text):
    """Parse YAML text (or a stream) with :class:`YamlLoader`.

    Raises
    ------
    yaml.YAMLError
        a :class:`DuplicateKeyError` for a key given twice, naming it and its lines.
    """
    return yaml.load(text, Loader=YamlLoader)  # noqa: S506 - a SafeLoader subclass


def yaml_problem(exc) -> tuple[str, str | None, str | None]:
    """(message, key, place) of a YAML error, for a one-line AssimError."""
    mark = getattr(exc, "problem_mark", None)
    place = f"line {mark.line + 1}" if mark is not None else None
    if isinstance(exc, DuplicateKeyError):
        return f"duplicate key: {exc.problem}", str(exc.key), place
    return "not valid YAML", None, place
