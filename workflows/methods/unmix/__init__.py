"""Linear spectral unmixing: the solvers (:mod:`.solver`) and the engine step with its configuration
(:mod:`.step`). Every public name of both is importable from here."""
from __future__ import annotations

from swathmill.workflows.methods.unmix import solver as _solver
from swathmill.workflows.methods.unmix import step as _step
from swathmill.workflows.methods.unmix.solver import *  # noqa: F401,F403
from swathmill.workflows.methods.unmix.solver import _prepare_endmembers  # noqa: F401
from swathmill.workflows.methods.unmix.step import *  # noqa: F401,F403
from swathmill.workflows.methods.unmix.step import _unmixer  # noqa: F401  (tests/benchmarks/bench_unmix.py)

__all__ = [*_solver.__all__, *_step.__all__]
