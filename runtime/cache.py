"""On-disk cache of compiled artifacts, keyed by content hash.

An entry is a directory ``<root>/<key>/`` holding the artifact files and a
``MANIFEST.json`` listing each file's SHA-256. Entries are built in a private
temporary directory beside the root and published with one atomic
``rename``; a lock file serialises concurrent builders of the same key
(several processes compiling one scheme build it once). An entry whose
manifest is missing or whose files do not match their hashes (a crash, a
truncated file) is detected on lookup and rebuilt.

The root is ``$TREEFLUX_CACHE_DIR`` if set, else ``$XDG_CACHE_HOME/treeflux``,
else ``~/.cache/treeflux``.
"""

from __future__ import annotations

import fcntl
import hashlib
import json
import os
import platform
import shutil
import subprocess
import sys
import tempfile
from contextlib import contextmanager
from pathlib import Path

MANIFEST = "MANIFEST.json"
FORMAT = 1


def root() -> Path:
    env = os.environ.get("TREEFLUX_CACHE_DIR")
    if env:
        return Path(env)
    base = os.environ.get("XDG_CACHE_HOME") or os.path.join(os.path.expanduser("~"), ".cache")
    return Path(base) / "treeflux"


def host_features() -> str:
    """The host CPU as far as generated native code depends on it."""
    flags = ""
    try:
        with open("/proc/cpuinfo") as fh:
            for line in fh:
                if line.startswith("flags"):
                    flags = " ".join(sorted(line.split(":", 1)[1].split()))
                    break
    except OSError:
        pass
    return f"{platform.machine()}|{platform.system()}|{sys.implementation.cache_tag}|{flags}"


def make_key(*parts) -> str:
    """A cache key: SHA-256 over the given parts (text), the format and the host."""
    h = hashlib.sha256()
    for p in (f"format={FORMAT}", host_features(), *map(str, parts)):
        h.update(p.encode())
        h.update(b"\0")
    return h.hexdigest()[:40]


def _digest(path: Path) -> str:
    return hashlib.sha256(path.read_bytes()).hexdigest()


def is_valid(entry: Path) -> bool:
    """True if ``entry`` exists and every file matches its manifest hash."""
    try:
        manifest = json.loads((entry / MANIFEST).read_text())
        return all(_digest(entry / name) == sha for name, sha in manifest["files"].items())
    except (OSError, ValueError, KeyError, TypeError):
        return False


@contextmanager
def _locked(path: Path):
    path.parent.mkdir(parents=True, exist_ok=True)
    with open(path, "a+") as fh:
        fcntl.flock(fh, fcntl.LOCK_EX)
        try:
            yield
        finally:
            fcntl.flock(fh, fcntl.LOCK_UN)


def fetch(key: str, build) -> Path:
    """The directory of entry ``key``, building it with ``build(tmpdir)`` if absent
    or corrupt. ``build`` writes its files into the directory it is given."""
    top = root()
    entry = top / key
    if is_valid(entry):
        return entry
    with _locked(top / ".locks" / f"{key}.lock"):
        if is_valid(entry):
            return entry
        work = Path(tempfile.mkdtemp(prefix=f".build-{key[:12]}-", dir=top))
        try:
            build(work)
            files = {p.name: _digest(p) for p in sorted(work.iterdir()) if p.is_file()}
            (work / MANIFEST).write_text(json.dumps({"key": key, "files": files}, sort_keys=True))
            if entry.exists():
                trash = Path(tempfile.mkdtemp(prefix=".trash-", dir=top))
                os.rename(entry, trash / "old")
                shutil.rmtree(trash, ignore_errors=True)
            os.rename(work, entry)
        except BaseException:
            shutil.rmtree(work, ignore_errors=True)
            raise
    return entry


def info() -> dict:
    """Location, number of entries and their total size in bytes."""
    top = root()
    entries = [p for p in top.iterdir() if p.is_dir() and not p.name.startswith(".")] if top.exists() else []
    size = sum(f.stat().st_size for e in entries for f in e.rglob("*") if f.is_file())
    return {"location": str(top), "entries": len(entries), "bytes": size}


def clear() -> int:
    """Remove every entry; returns how many were removed."""
    top = root()
    if not top.exists():
        return 0
    n = 0
    for p in top.iterdir():
        if p.is_dir():
            n += not p.name.startswith(".")
            shutil.rmtree(p, ignore_errors=True)
    return n


class CompileError(RuntimeError):
    pass


def shared_library(c_source: str, *, flags=("-O3", "-march=native"), libs=("-lm",),
                   name: str = "kernel") -> Path:
    """Compile C source into a shared library through the cache; returns its path.

    Uses ``$CC`` or ``cc``. The key covers the source, flags and host, so a
    cached library is reused only where it was built for the same CPU.
    """
    cc = os.environ.get("CC", "cc")
    key = make_key("c-shared", cc, " ".join(flags), " ".join(libs), c_source)

    def build(work: Path):
        src = work / f"{name}.c"
        src.write_text(c_source)
        cmd = [cc, *flags, "-fPIC", "-shared", "-o", str(work / f"{name}.so"), str(src), *libs]
        try:
            res = subprocess.run(cmd, capture_output=True, text=True)
        except FileNotFoundError:
            raise CompileError(f"C compiler {cc!r} not found") from None
        if res.returncode != 0:
            first = (res.stderr.strip().splitlines() or ["no message"])[0]
            raise CompileError(f"C compilation failed: {first}")

    return fetch(key, build) / f"{name}.so"
