"""Spectral arithmetic with no engine and no I/O: band resampling, continuum removal, band depth."""
