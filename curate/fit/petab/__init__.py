"""PEtab v1 problems simulated: formulas (sympy) and the model (libroadrunner)."""

from __future__ import annotations

from curate.fit.petab.formulas import Formula, parse_formula
from curate.fit.petab.model import PetabModel, SolverTolerances

__all__ = ["Formula", "PetabModel", "SolverTolerances", "parse_formula"]
