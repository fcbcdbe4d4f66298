"""Numerical core: numpy arrays in, numbers and small frozen results out.

No file I/O, no printing, no pandas. Layers above (analysis, outputs, cli)
import from here; nothing here imports from them.
"""
