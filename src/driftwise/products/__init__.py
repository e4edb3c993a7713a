"""Layer 5, what users open: file writers (JSON, CSV, NetCDF, GeoJSON), figures, map axes and the HTML report.

May import: every layer below (ground floor, ``data``, ``gp``, ``dynamics``, ``diagnostics``) and this package.
"""
