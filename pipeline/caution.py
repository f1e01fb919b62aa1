"""The one wording of the caution that shiftgrid's forecasts are research output, not advisories.

Shown by `shiftgrid demo --run` and twice in the HTML report. Reads and writes nothing; obeys no config
key. A module of its own so that the report imports no command-line code and an edit of the wording
re-renders the report only.
"""

CAUTION = ("Research forecasts only: not an air-quality advisory. Public health alerts follow the local "
           "agency and the applicable regulations.")
