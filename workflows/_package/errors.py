"""The one root of every error swathmill raises on purpose, and the exit code each kind maps to.

Every specific error (a configuration key, an input file, a step declaration, a plan, a store, a run
directory in use) derives from :class:`SwathmillError`, so the command line maps them to exit codes in
one place (``exit_code``) and shows their message as it is. Errors keep their ``ValueError`` or
``RuntimeError`` base as well, so callers that caught those still do.
"""
from __future__ import annotations

__all__ = ["SwathmillError", "EXIT_OK", "EXIT_FAILED", "EXIT_INPUT", "EXIT_LOCKED"]

EXIT_OK, EXIT_FAILED, EXIT_INPUT, EXIT_LOCKED = 0, 1, 2, 3


class SwathmillError(Exception):
    """Root of swathmill's errors. ``exit_code``: what the command line returns for it (bad input: 2)."""

    exit_code: int = EXIT_INPUT
