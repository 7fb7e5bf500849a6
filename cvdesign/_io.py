"""Small I/O helpers: atomic writes, so no half-written output file is ever left."""

import contextlib
import os
import tempfile
from pathlib import Path

__all__ = ["atomic_write_text", "atomic_open"]


@contextlib.contextmanager
def atomic_open(path, mode="w", **kwargs):
    """Open a temporary file beside `path`; rename it onto `path` on success.

    On an exception the temporary file is removed and `path` is untouched.
    """
    path = Path(path)
    fd, tmp = tempfile.mkstemp(dir=path.parent, prefix=f".{path.name}.", suffix=".tmp")
    try:
        with os.fdopen(fd, mode, **kwargs) as fh:
            yield fh
        os.replace(tmp, path)
    except BaseException:
        with contextlib.suppress(FileNotFoundError):
            os.unlink(tmp)
        raise


def atomic_write_text(path, text):
    """Write `text` to `path` (UTF-8, ``\\n`` line ends) through a temporary file."""
    with atomic_open(path, "w", encoding="utf-8", newline="\n") as fh:
        fh.write(text)
