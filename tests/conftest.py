"""Shared pytest settings. The test folders mirror the package (core/, data/,
modelfile/, audit/, report/, cli/, reliability/, bench/); helper modules live
beside this file and are importable from every folder (pyproject: pythonpath)."""
