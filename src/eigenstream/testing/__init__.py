"""Test helpers: samplers of manifolds with known spectra and comparison assertions."""
