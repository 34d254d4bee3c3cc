"""Differential geometry of control-affine systems: Lie derivatives, brackets, distributions.

Vector fields are sympy column matrices, covector fields are row matrices, and ``x`` is
the ordered tuple of coordinates. Decisions that need "is this expression zero?" or
"what is the rank?" go through a :class:`NumericContext`, which holds the parameter
values and the random sample points used when simplification alone cannot decide.

Conventions (Isidori, Nonlinear Control Systems, 3rd ed., sec. 1.2):
``L_f h = dh . f``, ``[f, g] = (dg/dx) f - (df/dx) g``, ``ad_f^0 g = g``,
``ad_f^k g = [f, ad_f^(k-1) g]``.

Modules: ``_lie`` (derivatives, brackets, distributions: symbolic only), ``_decisions``
(the numeric context, the zero test, evaluation and ranks), ``_involutivity`` (Frobenius,
symbolic for small distributions, sampled otherwise), ``_jets`` (Lie derivatives,
``ad_f^k g`` and their directional derivatives at sample points by Taylor-mode jets, for
expressions beyond the symbolic budget), ``_budget`` (that size budget, the CPU-time
budget and progress).

Public names
------------
lie_derivative, lie_derivative_covector, lie_bracket, ad, distribution, bracket_blocks
NumericContext, Decision, is_identically_zero, evaluate, rank_at, generic_rank,
Involutivity, involutivity
PlantJets, JetProgram, UnsupportedExpression, SYMBOLIC_TREE_BUDGET, beyond_tree_budget, tree_size,
Monitor, BudgetExceeded, checkpoint, BeyondSymbolicBudget
"""

from linz_ros.geometry._budget import (SYMBOLIC_TREE_BUDGET, BeyondSymbolicBudget, BudgetExceeded, Monitor, beyond_tree_budget,
                                       checkpoint, tree_size)
from linz_ros.geometry._decisions import (RANK_ATOL, RANK_RTOL, SYMBOLIC_RANK_BUDGET, SYMBOLIC_RANK_MAX_ENTRIES,
                                          ZERO_ATOL, ZERO_DIGITS, Decision, NumericContext, RankResult, evaluate,
                                          evaluate_many, fits_symbolic_budget, generic_rank, is_identically_zero,
                                          numeric_rank, rank_at, sampled_rank)
from linz_ros.geometry._involutivity import Involutivity, involutivity
from linz_ros.geometry._jets import JetProgram, PlantJets, UnsupportedExpression
from linz_ros.geometry._lie import ad, bracket_blocks, distribution, lie_bracket, lie_derivative, lie_derivative_covector

__all__ = [
    "lie_derivative", "lie_derivative_covector", "lie_bracket", "ad", "distribution", "bracket_blocks",
    "NumericContext", "Decision", "is_identically_zero", "evaluate", "rank_at",
    "generic_rank", "Involutivity", "involutivity", "evaluate_many", "numeric_rank",
    "sampled_rank", "fits_symbolic_budget", "RankResult", "PlantJets", "JetProgram", "UnsupportedExpression",
    "SYMBOLIC_TREE_BUDGET", "beyond_tree_budget", "tree_size", "Monitor", "BudgetExceeded", "checkpoint", "BeyondSymbolicBudget",
]
