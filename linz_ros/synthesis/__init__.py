"""Synthesis of the linearizing law: coordinate change, control law, outer-loop gains.

Public names
------------
synthesise        plant (+ analysis) -> Design: law terms A(x), b(x), chains, gains, guards
Design, Chain     the result
DesignOptions     command-line overrides of the plant file's design section
gains_from_poles  Brunovsky-chain gains that place given poles (repeated poles allowed)
gains_from_lqr    LQR gains of stacked chains (scipy's continuous Riccati solver)
sampled_loop      the chain under a zero-order-hold sampled law: spectral radius, decay
closed_form_inverse  x = T^-1(z) in closed form, when sympy can solve it one state at a time
"""

from linz_ros.synthesis._design import Chain, Design, DesignOptions, synthesise
from linz_ros.synthesis._gains import (SampledLoop, chain_matrices, closed_loop_poles, gains_from_lqr,
                                       gains_from_poles, sampled_loop)
from linz_ros.synthesis._transform import closed_form_inverse, transformed_symbols
from linz_ros.synthesis._extension import delayed_counts

__all__ = ["synthesise", "Design", "Chain", "DesignOptions", "gains_from_poles", "gains_from_lqr",
           "sampled_loop", "SampledLoop", "chain_matrices", "closed_loop_poles", "closed_form_inverse",
           "transformed_symbols", "delayed_counts"]
