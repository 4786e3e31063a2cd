"""swathmill's tile engine: grids, tilings, stores, steps, runs, executors and product export.

It knows shapes, dtypes, nodata, CRS and bands as an axis, and nothing of what the bands mean.
"""
from .grid import Grid, Tile, Tiling, Window
from .step import Block, Fit, InputMeta, OutputSpec, Step, StepError
from .store import StoreLayout, TileStore, create_store, open_store
from .run import PlanError, Run, RunOptions, RunResult, run_status
from .executors import DaskExecutor, LocalExecutor, make_executor

__all__ = ["Grid", "Tile", "Tiling", "Window", "Block", "Fit", "InputMeta", "OutputSpec", "Step", "StepError",
           "StoreLayout", "TileStore", "create_store", "open_store", "PlanError", "Run", "RunOptions", "RunResult",
           "run_status", "DaskExecutor", "LocalExecutor", "make_executor"]
