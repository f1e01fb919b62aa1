"""shiftgrid: cross-city forecasting experiments with and without invariance penalties.

The package holds the logic of every pipeline step; the Snakefile and rule files only wire them.
"""

__version__ = "0.1.0"
