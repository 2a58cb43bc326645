"""The numerical core: pure functions on NumPy arrays, no Flask and no I/O."""
