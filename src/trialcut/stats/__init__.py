"""Statistics layer: numpy, scipy, pandas and statsmodels only. Never reads a plan or a file."""
