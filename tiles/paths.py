"""Relative path resolution: a path from a configuration is relative to the configuration's folder."""
from __future__ import annotations

from pathlib import Path

__all__ = ["resolve"]


def resolve(base: str | Path | None, p: str | Path) -> Path:
    """``p`` with ``~`` expanded, joined to ``base`` when it is relative and a base is given.

    Parameters
    ----------
    base : str, Path or None
        The folder relative paths are relative to (normally the configuration file's folder); None
        leaves a relative path as it is (relative to the working directory).
    p : str or Path
        The path as written.

    Returns
    -------
    Path
        An absolute path as written, ``base / p`` for a relative one. The path is not normalised
        (``..`` and links are kept); call :meth:`Path.resolve` where an absolute, normalised path is needed.
    """
    q = Path(p).expanduser()
    if q.is_absolute() or base is None:
        return q
    return Path(base) / q
