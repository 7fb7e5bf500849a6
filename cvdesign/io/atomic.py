"""Small I/O helpers: atomic writes, so no half-written output file is ever left."""

import contextlib
import os
import shutil
import tempfile
from pathlib import Path

__all__ = ["atomic_write_text", "atomic_open", "atomic_path", "atomic_paths",
           "check_output_file", "prepare_output_dir",
           "write_dir_atomically"]


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


def _is_within(path, directory):
    try:
        Path(path).resolve().relative_to(Path(directory).resolve())
        return True
    except ValueError:
        return False


def prepare_output_dir(out_dir, *, force=False, inputs=(), marker=None, owned=None,
                       option="--out"):
    """Check that a whole output directory may be (re)written; return it as a Path.

    Parameters
    ----------
    out_dir : path-like
        The directory.
    force : bool, default=False
        Allow replacing an existing non-empty directory, but only one that an
        earlier run wrote (it holds `marker`) and that holds none of `inputs`.
    inputs : sequence of path-like
        Files the run reads; the directory must not contain any of them.
    marker : str, default=None
        File name that marks a directory written by an earlier run.
    owned : callable, default=None
        ``owned(name) -> bool``: whether a file of that name is one the run
        writes. With `force`, a directory holding anything else (a file of the
        user's, a subdirectory) is refused, since replacing the directory would
        delete it. None: no such check.
    option : str, default="--out"
        Name of the option in messages.

    Raises
    ------
    cvdesign.errors.InputError
        When the directory may not be written, saying why and what to do.
    """
    from ..errors import InputError

    out_dir = Path(out_dir)
    resolved = out_dir.resolve()
    if _is_within(Path.cwd(), resolved):
        raise InputError(f"{option} {str(out_dir)!r} is the current directory or one of its "
                         "parents; give a new directory name")
    inside = [str(p) for p in inputs if _is_within(p, resolved)]
    if inside:
        raise InputError(f"{option} {str(out_dir)!r} contains an input file ({inside[0]!r}); "
                         "writing there would replace it. Give another directory")
    if out_dir.exists():
        if not out_dir.is_dir():
            raise InputError(f"{option} {str(out_dir)!r} exists and is not a directory; "
                             "choose another name")
        if any(out_dir.iterdir()):
            if not force:
                raise InputError(f"output directory {str(out_dir)!r} exists and is not empty; "
                                 f"choose another {option}, or pass --force to replace it")
            if marker is not None and not (out_dir / marker).exists():
                raise InputError(f"output directory {str(out_dir)!r} is not empty and was not "
                                 f"written by cvdesign (no {marker}); --force only replaces "
                                 "an earlier cvdesign output. Choose another name")
            foreign = sorted(p.name for p in out_dir.iterdir()
                             if owned is not None and not (p.is_file() and owned(p.name)))
            if foreign:
                raise InputError(
                    f"output directory {str(out_dir)!r} holds {len(foreign)} file(s) cvdesign "
                    f"did not write (e.g. {foreign[0]!r}), which --force would delete with the "
                    "earlier output; move them elsewhere, or choose another name")
    _check_parent(resolved.parent, out_dir, option)
    return out_dir


def _check_parent(parent, out, option):
    """Refuse an output whose directory is missing, not a directory, or not writable."""
    from ..errors import InputError

    if not parent.exists():
        raise InputError(f"the directory of {option} {str(out)!r} ({str(parent)!r}) does not "
                         "exist; create it first or choose another place")
    if not parent.is_dir():
        raise InputError(f"cannot write {option} {str(out)!r}: {str(parent)!r} is a file, not a "
                         "directory; choose another place")
    if not os.access(parent, os.W_OK | os.X_OK):
        raise InputError(f"cannot write {option} {str(out)!r}: no permission to write in "
                         f"{str(parent)!r}; choose a writable place")
    try:  # permissions do not tell everything (read-only file systems, root)
        fd, probe = tempfile.mkstemp(dir=parent, prefix=".cvdesign-", suffix=".probe")
    except OSError as exc:
        raise InputError(f"cannot write {option} {str(out)!r}: the directory {str(parent)!r} "
                         f"is not writable ({exc.strerror}); choose a writable place") from None
    os.close(fd)
    os.unlink(probe)


def _same_file(a, b):
    try:
        return os.path.samefile(a, b)
    except OSError:
        return Path(a).resolve() == Path(b).resolve()


def check_output_file(path, *, force=False, inputs=(), option="--out"):
    """Check, before any computation, that an output file may be written; return it as a Path.

    Parameters
    ----------
    path : path-like
        The output file.
    force : bool, default=False
        Allow replacing an existing regular file (never one of `inputs`).
    inputs : sequence of path-like
        Files the command reads; the output must not be any of them.
    option : str, default="--out"
        Name of the option in messages.

    Raises
    ------
    cvdesign.errors.InputError
        When the file may not be written, saying why and what to do.

    Examples
    --------
    >>> import tempfile
    >>> with tempfile.TemporaryDirectory() as tmp:
    ...     src = os.path.join(tmp, "run.xtc")
    ...     open(src, "w").close()
    ...     check_output_file(src, force=True, inputs=[src])  # doctest: +ELLIPSIS
    Traceback (most recent call last):
    ...
    cvdesign.errors.InputError: --out '...run.xtc' is one of the input files; ...
    """
    from ..errors import InputError

    path = Path(path)
    if path.is_dir():
        raise InputError(f"{option} {str(path)!r} is a directory; give a file name")
    for given in inputs:
        if Path(given).exists() and path.exists() and _same_file(path, given):
            raise InputError(f"{option} {str(path)!r} is one of the input files; writing it "
                             "would replace that input. Give a new name")
    if path.exists() or path.is_symlink():
        if not path.is_file():
            raise InputError(f"{option} {str(path)!r} exists and is not a regular file; "
                             "choose another name")
        if not force:
            raise InputError(f"{option} {str(path)!r} already exists; choose another name, or "
                             "pass --force to replace it")
    _check_parent(path.resolve().parent, path, option)
    return path


def write_dir_atomically(out_dir, files, *, option="--out"):
    """Write ``{name: text}`` into `out_dir`, all or nothing.

    The files go into a temporary directory beside `out_dir`, which then
    replaces it by renames, so an interrupted run leaves no partial output.
    File permissions follow the process umask.
    """
    from ..errors import InputError

    out_dir = Path(out_dir)
    umask = os.umask(0)
    os.umask(umask)
    try:
        tmp = Path(tempfile.mkdtemp(dir=out_dir.resolve().parent, prefix=f".{out_dir.name}.tmp-"))
    except OSError as exc:
        raise InputError(f"cannot write {option} {str(out_dir)!r}: {exc.strerror}") from exc
    try:
        os.chmod(tmp, 0o777 & ~umask)
        for name, text in files.items():
            with open(tmp / name, "w", encoding="utf-8", newline="\n") as fh:
                fh.write(text)
        if out_dir.exists():
            old = Path(tempfile.mkdtemp(dir=tmp.parent, prefix=f".{out_dir.name}.old-"))
            os.rmdir(old)
            os.replace(out_dir, old)
            try:
                os.replace(tmp, out_dir)
            except BaseException:
                os.replace(old, out_dir)  # put the previous output back
                raise
            shutil.rmtree(old)
        else:
            os.replace(tmp, out_dir)
    except OSError as exc:
        shutil.rmtree(tmp, ignore_errors=True)
        raise InputError(f"cannot write {option} {str(out_dir)!r}: {exc.strerror or exc}") from exc
    except BaseException:
        shutil.rmtree(tmp, ignore_errors=True)
        raise


@contextlib.contextmanager
def atomic_paths(paths):
    """Yield temporary file names beside each of `paths`, for writers that take a name;
    rename them all into place on success.

    The temporary names keep each path's suffix (writers that choose a format by the
    extension still see it). On success every file gets the permissions the process umask
    allows and is renamed onto its path, in order, after all were written; on an
    exception every temporary file is removed and no path is touched.
    """
    paths = [Path(p) for p in paths]
    tmps = []
    try:
        for path in paths:
            fd, tmp = tempfile.mkstemp(dir=path.parent, prefix=f".{path.stem}.", suffix=path.suffix)
            os.close(fd)
            tmps.append(tmp)
        yield list(tmps)
        umask = os.umask(0)
        os.umask(umask)
        for tmp in tmps:
            os.chmod(tmp, 0o666 & ~umask)
        for tmp, path in zip(tmps, paths):
            os.replace(tmp, path)
    except BaseException:
        for tmp in tmps:
            with contextlib.suppress(FileNotFoundError):
                os.unlink(tmp)
        raise


@contextlib.contextmanager
def atomic_path(path):
    """Yield a temporary file name beside `path` for a writer that takes a name.

    On success the file gets the permissions the process umask allows and is
    renamed onto `path`; on an exception it is removed and `path` is untouched.
    """
    with atomic_paths([path]) as (tmp,):
        yield tmp
