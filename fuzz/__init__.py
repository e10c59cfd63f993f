"""Fuzz targets for every parser that reads bytes from another party (see fuzz/targets.py, `make fuzz`)."""
