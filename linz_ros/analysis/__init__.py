"""Linearizability analysis of a plant: the verdicts behind ``linz check``.

Public names
------------
analyse               run every analysis and return a Report (within a CPU-time budget)
DEFAULT_BUDGET_SECONDS  the default CPU-time budget of ``linz check``
render_text           the Report as readable text (verdict first)
Report                the result, with ``to_json()`` for the command-line contract
analyse_input_state   input-state verdict, distributions D_k, indices, linearizing output
analyse_input_output  relative degree, decoupling matrix, singular set, zero dynamics
sample_envelope       conditioning of a matrix over the operating envelope
output_ranges         range of each output over the envelope (default divergence bounds)
invariant_zeros       finite zeros of a square linear system
controllability_indices  Kronecker indices from the ranks of D_k
plant_context         parameters and random envelope points for numeric decisions
lie_chain             relative degree of one output and its derivatives h, L_f h, ...
mechanical_terms      numeric M, F, B, J and J M^-1 B of a mechanical plant
search_dynamic_extension  integrators on inputs that decouple a rank-deficient square plant (bounded)
"""

from linz_ros.analysis._common import plant_context
from linz_ros.analysis._extension import DynamicExtension, extended_plant, search_dynamic_extension
from linz_ros.analysis._envelope import EnvelopeResult, envelope_points, output_ranges, sample_envelope
from linz_ros.analysis._input_output import (InputOutputResult, ZeroDynamics, analyse_input_output,
                                             decoupling_terms, invariant_zeros)
from linz_ros.analysis._input_state import (DistributionInfo, InputStateResult, analyse_input_state,
                                            controllability_indices, lie_chain,
                                            relative_degree_of)
from linz_ros.analysis._mechanical import MechanicalTerms, mechanical_terms
from linz_ros.analysis._report import DEFAULT_BUDGET_SECONDS, Report, analyse, render_text, render_verdict

__all__ = [
    "analyse", "render_text", "render_verdict", "Report", "analyse_input_state", "analyse_input_output",
    "sample_envelope", "envelope_points", "output_ranges", "invariant_zeros", "controllability_indices", "relative_degree_of",
    "decoupling_terms", "lie_chain", "DistributionInfo", "InputStateResult", "InputOutputResult",
    "ZeroDynamics", "EnvelopeResult", "plant_context", "MechanicalTerms", "mechanical_terms",
    "DEFAULT_BUDGET_SECONDS", "DynamicExtension", "search_dynamic_extension", "extended_plant",
]
