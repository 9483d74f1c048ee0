"""reduce: shrink big event tables into browser-sized payloads that fit a byte budget.

Library entry points (the command line calls the same functions):

- :func:`load_recipe` reads and validates a recipe file;
- :func:`fit` computes the finest partial once and picks the finest level whose payload fits
  the budget, returning the payload and the frontier of evaluated levels as a DataFrame;
- :func:`ladder` does the same with raw, gzip and brotli sizes measured for every candidate;
- :func:`run` fits and publishes the payload and its manifest atomically;
- :func:`check` validates many recipes, their sources and denominators without scanning,
  listing every problem.
"""

from __future__ import annotations

from reduce._version import __version__
from reduce.errors import (
    AuditError,
    BudgetError,
    DenominatorError,
    OutputError,
    RecipeError,
    ReduceError,
    SourceError,
)
from reduce.pipeline import FitResult, RunResult, fit, ladder, run
from reduce.recipe import Recipe, load_recipe
from reduce.validate import CheckReport, check

__all__ = [
    "AuditError",
    "BudgetError",
    "CheckReport",
    "DenominatorError",
    "FitResult",
    "OutputError",
    "Recipe",
    "RecipeError",
    "ReduceError",
    "RunResult",
    "SourceError",
    "__version__",
    "check",
    "fit",
    "ladder",
    "load_recipe",
    "run",
]
