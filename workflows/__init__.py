"""swathmill science steps, pipeline and command line."""
