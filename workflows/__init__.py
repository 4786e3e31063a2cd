"""swathmill's science side: the spectral maths, the inputs, the methods as steps, and the application.

Sub-packages, and the direction of their imports (each may import those listed after it, and the
engine :mod:`swathmill.tiles`; never those before it):

- ``app``: configuration, pipeline, run view, report, demo scenario, command line;
- ``methods``: the steps (mosaic, MNF/PCA, endmembers, classification, unmixing, features,
  calibration) and accuracy assessment;
- ``inputs``: flight lines, spectral library tables, ground reference;
- ``spectral``: resampling, continuum removal (plain numpy).
"""
