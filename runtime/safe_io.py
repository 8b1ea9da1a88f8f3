"""Writing output files without harming anything else on the machine.

Every file treeflux writes for a user (``compile -o``, ``emit``, ``sample
--out``, ``--plot``) goes through this module:

- the data goes to a fresh temporary file created exclusively (``O_EXCL``,
  ``O_NOFOLLOW``) in the target folder, then is renamed over the final name,
  so a reader never sees half a file and a symlink planted at the temporary
  name is never followed;
- the final name must be absent or a regular file: a symlink, a device node,
  a FIFO or a directory there is refused, never replaced or written through;
- the file gets the usual permissions (0666 less the umask), not mkstemp's 0600;
- :func:`write_files` publishes several files all-or-nothing: every file is
  written to its temporary first, and only then renamed into place.

Errors are :class:`~treeflux.runtime.errors.TreefluxError` with one line
naming the path.
"""

from __future__ import annotations

import os
import secrets
import stat
from contextlib import contextmanager
from pathlib import Path

from .errors import TreefluxError

__all__ = ["OutputError", "check_target", "write_file", "write_files", "output_path"]


class OutputError(TreefluxError):
    """An output path that treeflux refuses to write."""


def _umask() -> int:
    mask = os.umask(0)
    os.umask(mask)
    return mask


def check_target(path) -> Path:
    """Refuse an output path whose folder is missing or whose final name is
    anything but a regular file (or absent). Returns the path."""
    path = Path(path)
    folder = path.parent if str(path.parent) else Path(".")
    if not folder.is_dir():
        raise OutputError(f"cannot write {path}: folder {folder} does not exist")
    try:
        st = os.lstat(path)
    except FileNotFoundError:
        return path
    if stat.S_ISLNK(st.st_mode):
        raise OutputError(f"refusing to write {path}: it is a symbolic link")
    if not stat.S_ISREG(st.st_mode):
        raise OutputError(f"refusing to write {path}: it exists and is not a regular file")
    return path


def _temporary(path: Path) -> tuple[int, Path]:
    """A new file beside ``path``, created exclusively, never through a link."""
    flags = os.O_WRONLY | os.O_CREAT | os.O_EXCL | getattr(os, "O_NOFOLLOW", 0) | getattr(os, "O_CLOEXEC", 0)
    for _ in range(100):
        tmp = path.with_name(f".{path.name}.{secrets.token_hex(6)}.tmp")
        try:
            fd = os.open(tmp, flags, 0o666 & ~_umask())
        except FileExistsError:
            continue
        except OSError as exc:
            raise OutputError(f"cannot write {path}: {exc.strerror}") from None
        return fd, tmp
    raise OutputError(f"cannot write {path}: no free temporary name in its folder")


def _publish(tmp: Path, path: Path) -> None:
    check_target(path)  # again, just before the rename: nothing special appeared meanwhile
    os.replace(tmp, path)


def write_file(path, data) -> Path:
    """Write ``data`` (str or bytes) to ``path`` atomically; see the module doc."""
    return write_files({Path(path): data})[0]


def write_files(files: dict) -> list[Path]:
    """Write several files all-or-nothing: {path: str | bytes} → written paths."""
    paths = [check_target(p) for p in files]
    staged: list[tuple[Path, Path]] = []
    try:
        for path, data in zip(paths, files.values()):
            fd, tmp = _temporary(path)
            staged.append((tmp, path))
            blob = data.encode() if isinstance(data, str) else bytes(data)
            with os.fdopen(fd, "wb") as fh:
                fh.write(blob)
                fh.flush()
                os.fsync(fh.fileno())
        for tmp, path in staged:
            _publish(tmp, path)
    except BaseException:
        for tmp, _ in staged:
            try:
                os.unlink(tmp)
            except FileNotFoundError:
                pass
        raise
    return paths


@contextmanager
def output_path(path):
    """For writers that want a file name (matplotlib's ``savefig``, ``np.savez``):
    yields a fresh temporary path beside ``path`` (same suffix) and renames it
    into place when the block ends without error; removes it otherwise."""
    path = check_target(path)
    fd, tmp = _temporary(path)
    os.close(fd)
    real = tmp.with_name(tmp.name[:-len(".tmp")] + path.suffix)
    try:
        os.replace(tmp, real)  # keep the suffix: some writers choose the format by it
        yield real
        _publish(real, path)
    except BaseException:
        for p in (tmp, real):
            try:
                os.unlink(p)
            except FileNotFoundError:
                pass
        raise
