"""Vegetation properties by inverting a leaf and canopy radiative-transfer model (see README, "Canopy")."""
from .forward import Geometry, RtmError, SIM_WAVELENGTHS, simulate_canopy, soil_spectrum, to_bands
from .lut import lut_search, predict_hybrid, sample_parameters, train_hybrid
from .step import CanopyConfig, build_steps, canopy_step

__all__ = ["Geometry", "RtmError", "SIM_WAVELENGTHS", "simulate_canopy", "soil_spectrum", "to_bands",
           "lut_search", "predict_hybrid", "sample_parameters", "train_hybrid", "CanopyConfig", "build_steps",
           "canopy_step"]
