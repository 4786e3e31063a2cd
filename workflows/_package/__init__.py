"""swathmill: airborne imaging-spectroscopy campaigns to tiled, resumable, accuracy-assessed map products.

Two sub-packages, imported one way only:

- :mod:`swathmill.tiles`, the engine (grids, stores, steps, runs, executors, COG and STAC export); it
  knows nothing of spectroscopy;
- :mod:`swathmill.workflows`, the science steps, the pipeline and the command line; it imports the engine.

This root module loads nothing heavy: ``import swathmill`` only sets ``__version__``.
"""
__version__ = "0.1.0"

__all__ = ["__version__"]
