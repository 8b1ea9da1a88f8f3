"""Progress reporting for long stages (tree enumeration, elimination,
simplification, native compilation, sampling, fitting).

One switch for the whole process: bars are drawn on stderr with tqdm when
stderr is a terminal, the stage lasts longer than about a second, and the
user has not asked for quiet (``--quiet``, ``--json``). Everything else
sees a no-op bar with the same interface, so stages call it
unconditionally::

    with progress("elimination", total=n, unit="state") as bar:
        for k in order:
            ...
            bar.update(1)

tqdm is optional at run time: without it there are no bars.
"""

from __future__ import annotations

import sys
from contextlib import contextmanager

__all__ = ["progress", "set_enabled", "enabled"]

_ENABLED = True
# A bar appears only for stages that are still running after this long.
DELAY_SECONDS = 1.0


def set_enabled(flag: bool) -> None:
    """Turn progress bars on or off for this process (``--quiet`` turns them off)."""
    global _ENABLED
    _ENABLED = bool(flag)


def enabled() -> bool:
    """True when bars may be drawn: not switched off and stderr is a terminal."""
    if not _ENABLED:
        return False
    try:
        return sys.stderr.isatty()
    except (AttributeError, ValueError):
        return False


class _Silent:
    def update(self, n: int = 1) -> None:
        pass

    def set_postfix_str(self, s: str = "") -> None:
        pass


@contextmanager
def progress(desc: str, *, total: int | None = None, unit: str = "it"):
    """A progress bar (or a silent stand-in) for one stage; see the module doc."""
    if not enabled():
        yield _Silent()
        return
    try:
        from tqdm import tqdm
    except ImportError:
        yield _Silent()
        return
    bar = tqdm(total=total, desc=desc, unit=unit, file=sys.stderr, delay=DELAY_SECONDS,
               leave=False, dynamic_ncols=True)
    try:
        yield bar
    finally:
        bar.close()
