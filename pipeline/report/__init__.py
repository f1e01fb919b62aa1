"""The self-contained HTML report of the grid: figures (figures.py), shift data (shift_data.py), page (html.py).

Reads the aggregation outputs (results/grid.*), QC and split records, results/shift.csv; writes
results/report.html. Config keys obeyed: the `report` slice (title, selection, figure_dpi, top_rows).
"""
