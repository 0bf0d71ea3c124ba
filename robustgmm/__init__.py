"""robustgmm: audit how robust a dynamic panel GMM result is."""
__version__ = "0.1.0"
