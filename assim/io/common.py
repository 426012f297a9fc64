"""Shared pieces of every writer: atomic replacement and CF global attributes."""

from __future__ import annotations

import contextlib
import datetime as _dt
import os
import tempfile
from collections.abc import Iterator
from pathlib import Path

from assim.caution import CAUTION
from assim.errors import RunError

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
    from assim import __version__

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
