"""The runtime tower: the controller core and its watchdogs, numpy only (no ROS, no sympy).

Public names
------------
ControllerCore    one guarded linearizing control step: ``step(x, ref, t) -> (u, record)``
WatchdogConfig    singularity levels, limits, staleness, safe command
StepRecord        what one step did (mode, reason, sigma_min, condition, saturation, cost); its layout,
                  encoding, decoding and CSV in ``runtime.steprecord``
Reference         y_ref and its derivatives per chain; ``make_reference``, ``parse_reference``
NumericPlant      dx/dt = f(x) + G(x) u from the artifact, with RK4 and RK45 integrators
Transform         z = T(x) and its inverse (closed form or warm-started Newton)
simulate          the sampled closed loop offline; SimSettings, SimResult, fit_decay_rate
run_verdict       one word for how a run went (VERDICTS), when it first happened and why
ALARMS            the watchdogs that watch the machine (envelope, divergence): StepRecord.alarms bits
"""

from linz_ros.runtime.closed_loop import INTEGRATORS, SimResult, SimSettings, fit_decay_rate, simulate
from linz_ros.runtime.core import ControllerCore
from linz_ros.runtime.plant import NumericPlant, mismatched_parameters, parse_assignments
from linz_ros.runtime.reference import KINDS, Reference, extrapolate_reference, make_reference, parse_reference
from linz_ros.runtime.steprecord import ALARMS, MODES, REASONS, StepRecord
from linz_ros.runtime.transform import InverseResult, Transform
from linz_ros.runtime.verdict import VERDICTS, Verdict, run_verdict
from linz_ros.runtime.watchdogs import WatchdogConfig

__all__ = ["ControllerCore", "WatchdogConfig", "StepRecord", "MODES", "REASONS", "Reference",
           "make_reference", "parse_reference", "extrapolate_reference", "KINDS", "NumericPlant", "mismatched_parameters",
           "parse_assignments", "Transform", "InverseResult", "simulate", "SimSettings", "SimResult",
           "fit_decay_rate", "INTEGRATORS", "ALARMS", "VERDICTS", "Verdict", "run_verdict"]
