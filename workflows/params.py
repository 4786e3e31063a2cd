"""The one base of every configuration section and step parameter set, and its shared checks.

A step's section of the run configuration is its parameter set: a frozen pydantic model with unknown
keys forbidden. The step factory passes that object as it is to :class:`swathmill.tiles.step.Step`
(``params=``); the kernel, the accumulator and the output declaration read typed attributes from it, and
the step key hashes its canonical JSON dump. Defaults and bounds live only on the model's fields.
"""
from __future__ import annotations

from typing import Any, Mapping

from pydantic import BaseModel, ConfigDict, ValidationError

__all__ = ["Section", "check_ref", "ctx_get", "validation_message"]


class Section(BaseModel):
    """Base of every configuration section: frozen (hashable into keys), unknown keys refused."""

    model_config = ConfigDict(extra="forbid", frozen=True)


def check_ref(ref: str | None, key: str = "input") -> str | None:
    """A config value naming a step's output, ``"step/output"`` (None passes); ValueError otherwise."""
    if ref is not None and ref.count("/") != 1:
        raise ValueError(f"{key} must be 'step/output'. Got {ref!r}")
    return ref


def ctx_get(ctx: Any, key: str, default: Any = None) -> Any:
    """A value of a step factory's context (a mapping or an object: grid, base_dir, valid)."""
    if ctx is None:
        return default
    if isinstance(ctx, Mapping):
        return ctx.get(key, default)
    return getattr(ctx, key, default)


def validation_message(error: ValidationError) -> str:
    """A pydantic validation error as one line: ``key: message (got value)`` per problem, ``; ``-joined.

    The key is the dotted location of the field at fault (``(settings)`` for a check of the whole
    section), so a step factory can quote it in its own error.
    """
    return "; ".join(f"{'.'.join(map(str, err['loc'])) or '(settings)'}: {err['msg']} (got {err.get('input')!r})"
                     for err in error.errors())
