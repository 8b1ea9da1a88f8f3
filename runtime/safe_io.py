"""Writing output files without harming anything else on the machine.

Every file treeflux writes for a user (``compile -o``, ``emit``, ``sample
--out``, ``--plot``) goes through this module:

- the data goes to a fresh temporary file created exclusively (``O_EXCL``,
  ``O_NOFOLLOW``) in the target folder, then is renamed over the final name,
  so a reader never sees half a file and a symlink planted at the temporary
  name is never followed;
- the final name must be absent or a regular file: a symlink, a device node,
  a FIFO or a directory there is refused, never replaced or written through
  (checked before any data is written and again just before each rename);
- the file gets the usual permissions (0666 less the umask), not mkstemp's 0600;
- :func:`write_files` publishes several files all-or-nothing: every file is
  written (and synced) to its temporary first, and only then are they renamed
  into place; if a rename fails or the process is interrupted (Ctrl-C) during
  that phase, the files already renamed are put back as they were (the old
  file, or no file). A process killed outright (SIGKILL, power loss) between
  two renames of that short phase can still leave a mix: POSIX has no
  multi-file rename;
- :func:`output_path` serves writers that insist on a file name (matplotlib's
  ``savefig``): the name lies in a fresh private folder (mode 0700) created
  beside the target, so nobody else can plant a link there meanwhile.

Errors are :class:`OutputError` (a :class:`~treeflux.runtime.errors.TreefluxError`)
with one line naming the path.
"""

from __future__ import annotations

import os
import secrets
import shutil
import stat
import tempfile
from contextlib import contextmanager
from pathlib import Path

from .errors import TreefluxError

__all__ = ["OutputError", "PLOT_SUFFIXES", "check_target", "check_plot_target",
           "write_file", "write_files", "output_path"]

# Figure formats treeflux writes; matplotlib draws more, but these three are
# the ones every build of it supports without extra libraries.
PLOT_SUFFIXES = (".png", ".svg", ".pdf")

_CREATE = os.O_WRONLY | os.O_CREAT | os.O_EXCL | getattr(os, "O_NOFOLLOW", 0) | getattr(os, "O_CLOEXEC", 0)


class OutputError(TreefluxError):
    """An output path that treeflux refuses to write."""


def _umask() -> int:
    mask = os.umask(0)
    os.umask(mask)
    return mask


def _why(exc: OSError) -> str:
    return exc.strerror or type(exc).__name__


def check_target(path) -> Path:
    """Refuse an output path whose folder is missing or whose final name is
    anything but a regular file (or absent). Returns the path."""
    path = Path(path)
    if not path.name or path.name in (".", ".."):
        raise OutputError(f"cannot write {path}: it names a folder, not a file")
    folder = path.parent
    if not folder.is_dir():
        raise OutputError(f"cannot write {path}: folder {folder} does not exist")
    try:
        st = os.lstat(path)
    except FileNotFoundError:
        return path
    except OSError as exc:
        raise OutputError(f"cannot write {path}: {_why(exc)}") from None
    if stat.S_ISLNK(st.st_mode):
        raise OutputError(f"refusing to write {path}: it is a symbolic link")
    if not stat.S_ISREG(st.st_mode):
        raise OutputError(f"refusing to write {path}: it exists and is not a regular file")
    return path


def check_plot_target(path) -> Path:
    """:func:`check_target` plus a figure format treeflux writes (by suffix):
    call it before any computation so a bad ``--plot`` costs nothing."""
    path = Path(path)
    if path.suffix.lower() not in PLOT_SUFFIXES:
        raise OutputError(f"cannot draw {path}: unsupported figure format "
                          f"{path.suffix or '(no extension)'}; use {', '.join(PLOT_SUFFIXES)}")
    return check_target(path)


def _temporary(path: Path) -> tuple[int, Path]:
    """A new file beside ``path``, created exclusively, never through a link."""
    for _ in range(100):
        tmp = path.with_name(f".{path.name}.{secrets.token_hex(6)}.tmp")
        try:
            fd = os.open(tmp, _CREATE, 0o666 & ~_umask())
        except FileExistsError:
            continue
        except OSError as exc:
            raise OutputError(f"cannot write {path}: {_why(exc)}") from None
        return fd, tmp
    raise OutputError(f"cannot write {path}: no free temporary name in its folder")


def _unlink(path) -> None:
    try:
        os.unlink(path)
    except FileNotFoundError:
        pass


def _keep_old(path: Path) -> Path | None:
    """A second name for the file now at ``path`` (a hard link beside it, or a
    copy where the file system has no hard links), so a failed publication can
    put it back; None if there is no file there."""
    if not os.path.lexists(path):
        return None
    for _ in range(100):
        backup = path.with_name(f".{path.name}.{secrets.token_hex(6)}.old")
        try:
            os.link(path, backup, follow_symlinks=False)
            return backup
        except FileExistsError:
            continue
        except OSError:
            return _copy_old(path)
    raise OutputError(f"cannot replace {path}: no free temporary name in its folder")


def _copy_old(path: Path) -> Path:
    try:
        fd = os.open(path, os.O_RDONLY | getattr(os, "O_NOFOLLOW", 0) | getattr(os, "O_NONBLOCK", 0))
        with os.fdopen(fd, "rb") as fh:
            st = os.fstat(fh.fileno())
            if not stat.S_ISREG(st.st_mode):
                raise OutputError(f"refusing to write {path}: it exists and is not a regular file")
            blob = fh.read()
    except OSError as exc:
        raise OutputError(f"cannot replace {path}: {_why(exc)}") from None
    backup = _stage(path, blob)
    os.chmod(backup, stat.S_IMODE(st.st_mode))
    return backup


def _stage(path: Path, blob: bytes) -> Path:
    fd, tmp = _temporary(path)
    try:
        with os.fdopen(fd, "wb") as fh:
            fh.write(blob)
            fh.flush()
            os.fsync(fh.fileno())
    except BaseException as exc:
        _unlink(tmp)
        if isinstance(exc, OSError):
            raise OutputError(f"cannot write {path}: {_why(exc)}") from None
        raise
    return tmp


def _publish_all(staged: list[tuple[Path, Path]]) -> None:
    """Rename each temporary over its path; on any failure undo the renames
    already done (old file back, or the new one removed) and re-raise.
    Entries leave ``staged`` as they are renamed, so what remains there on
    failure are temporaries still to remove."""
    done: list[tuple[Path, Path | None]] = []
    first = staged[0][1] if staged else None
    try:
        while staged:
            tmp, path = staged[0]
            check_target(path)  # again, just before the rename: nothing special appeared meanwhile
            backup = _keep_old(path)
            try:
                os.replace(tmp, path)
            except BaseException:
                if backup is not None:
                    _unlink(backup)  # the old file is still in place under its own name
                raise
            done.append((path, backup))
            staged.pop(0)
    except BaseException as exc:
        for path, backup in reversed(done):
            if backup is not None:
                os.replace(backup, path)
            else:
                _unlink(path)
        done.clear()
        if isinstance(exc, OSError) and not isinstance(exc, TreefluxError):
            raise OutputError(f"cannot write {first}: {_why(exc)}") from None
        raise
    finally:
        for _, backup in done:
            if backup is not None:
                _unlink(backup)


def write_file(path, data) -> Path:
    """Write ``data`` (str or bytes) to ``path`` atomically; see the module doc."""
    return write_files({Path(path): data})[0]


def write_files(files: dict) -> list[Path]:
    """Write several files all-or-nothing: {path: str | bytes} → written paths."""
    paths = [check_target(p) for p in files]
    if len(set(map(os.path.abspath, paths))) != len(paths):
        raise OutputError(f"cannot write {paths[0]}: the same file is named twice")
    staged: list[tuple[Path, Path]] = []
    try:
        for path, data in zip(paths, files.values()):
            blob = data.encode() if isinstance(data, str) else bytes(data)
            staged.append((_stage(path, blob), path))
        _publish_all(staged)
    finally:
        for tmp, _ in staged:  # only those not renamed into place
            _unlink(tmp)
    return paths


@contextmanager
def output_path(path):
    """For writers that want a file name (matplotlib's ``savefig``, ``np.savez``):
    yields a fresh path, with the same suffix, inside a new private folder
    beside ``path``; the file written there is renamed into place when the
    block ends without error. The folder is removed either way."""
    path = check_target(path)
    try:
        private = Path(tempfile.mkdtemp(prefix=f".{path.name}.", suffix=".tmpdir", dir=path.parent))
    except OSError as exc:
        raise OutputError(f"cannot write {path}: {_why(exc)}") from None
    try:
        inner = private / f"out{path.suffix}"
        yield inner
        try:
            st = os.lstat(inner)
        except OSError:
            st = None
        if st is None or not stat.S_ISREG(st.st_mode):
            raise OutputError(f"cannot write {path}: the writer produced no regular file")
        os.chmod(inner, 0o666 & ~_umask())
        _publish_all([(inner, path)])
    finally:
        shutil.rmtree(private, ignore_errors=True)
