"""Jinja2 for the report's markup, with autoescape on: every value a template shows is escaped unless it is
Markup, i.e. a block another template rendered. Reads and writes nothing.

The templates are strings in the modules that fill them, not files: the code digests follow the package's
Python modules (pipeline.import_graph), so an edited template re-renders the report like any edited code.
Filters: `rule` names a selection rule as every table and figure names it (pipeline.selection.label, so
target-peek reads "upper bound"); `g3` writes a number with 3 significant digits.
"""

from __future__ import annotations

from functools import cache

from jinja2 import Environment, StrictUndefined
from markupsafe import Markup

from pipeline import selection

_ENV = Environment(autoescape=True, undefined=StrictUndefined)  # a misspelt name fails, never renders empty
_ENV.filters["rule"] = selection.label
_ENV.filters["g3"] = lambda value: format(value, ".3g")


@cache
def _template(source: str):
    return _ENV.from_string(source)


def render(source: str, **values) -> Markup:
    """The template `source` filled with `values`; Markup, so a page can hold it unescaped."""
    return Markup(_template(source).render(**values))
