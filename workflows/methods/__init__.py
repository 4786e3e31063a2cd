"""The science steps: mosaic, MNF/PCA, endmembers, classifiers, unmixing, features, calibrations, accuracy.

Each module holds plain numpy functions for its method and the step declarations that wire them to the
engine; none of them opens a run directory or reads a configuration file.
"""
