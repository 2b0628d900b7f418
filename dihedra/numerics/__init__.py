"""Numerical foundations: torsion angles from coordinates (and their compiled kernels), block
averaging and statistical inefficiency, state populations with autocorrelation-aware errors.

No file access, no trajectory reading: arrays in, arrays and DataFrames out."""
