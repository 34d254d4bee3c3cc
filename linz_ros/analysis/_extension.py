"""Dynamic extension: delay inputs through integrators until the outputs can be decoupled.

When the decoupling matrix of a square plant (as many outputs as inputs) has generic rank
below the number of outputs, no static feedback decouples them; delaying some inputs through
chains of integrators may. Input u_j with k_j integrators gets compensator states
xi_j1 .. xi_jk (u_j = xi_j1, xi_j1' = xi_j2, ..., xi_jk' = w_j, w_j its new input); inputs
with k_j = 0 stay as they are. The reference construction is the dynamic extension
algorithm (Descusse and Moog 1985; Isidori, Nonlinear Control Systems, ch. 5). Ours is a
bounded search instead: every integrator count up to :data:`MAX_INTEGRATORS_PER_INPUT` per
input and :data:`MAX_ADDED_STATES` in all, by increasing number of added states (then
earlier inputs delayed first), taking the first extended plant whose decoupling matrix has
full generic rank, decided by the same tests as the static analysis (symbolic Lie chains and
rank, jets beyond the symbolic budget). Candidates are tried symbolically even when the
plant's brackets exceeded the budget: output chains are far smaller than brackets (the
quadrotor's extended chains are symbolic, its brackets are not).

The extended plant is built directly as a :class:`Plant` from sympy f, G, h rather than as
plant-file text: the expressions stay the ones the loader made (no printing and re-parsing,
no second validation of a model already validated), and compensator states need no file
field. Their names are our own: ``<input>_i1`` (the input's value), ``<input>_i2`` (its
rate), and the new input ``<input>_d<k>`` (its k-th derivative), with ``_`` appended until
no name of the plant is taken.

Operating point of the extended plant: the plant's own, with the first compensator state of
each delayed input (the input's value) at the midpoint of the input's limits when the plant
file gives them (a command the actuator can hold: the hover thrust of a multirotor with
limits [0, 2 m g]), else at the equilibrium input at the operating point (least squares of
f + G u = 0, when that is an equilibrium), else 0; the others (the input's derivatives)
start at 0. Random points for the decisions: the first compensator state within the input's
limits when given, the others within +-1 of their start.
"""

from __future__ import annotations

import time
from dataclasses import dataclass, field, replace
from typing import Any, Callable, Iterator

import numpy as np
import sympy as sp

from linz_ros.analysis._common import count, plant_context, show, show_matrix
from linz_ros.analysis._envelope import sample_envelope
from linz_ros.analysis._input_state import describe_singular_set, lie_chain
from linz_ros.analysis._numeric import numeric_chains, plant_jets, sampled_generic_rank
from linz_ros.geometry import (SYMBOLIC_TREE_BUDGET, BeyondSymbolicBudget, BudgetExceeded, Monitor, NumericContext,
                               evaluate, generic_rank)
from linz_ros.model import Plant

__all__ = ["DynamicExtension", "search_dynamic_extension", "extended_plant", "extension_candidates",
           "MAX_INTEGRATORS_PER_INPUT", "MAX_ADDED_STATES", "EXTENSION_SECONDS"]

#: Integrators at most on one input.
MAX_INTEGRATORS_PER_INPUT = 2
#: Compensator states at most in all.
MAX_ADDED_STATES = 4
#: CPU seconds the whole search may take (within the analysis budget, whichever ends first).
EXTENSION_SECONDS = 30.0
#: Points of the extended decoupling matrix's sweep over the extended envelope.
EXTENSION_ENVELOPE_SAMPLES = 256


@dataclass
class DynamicExtension:
    """The result of the search: the first extension that decouples the outputs, or why none did.

    Attributes
    ----------
    found : bool or None
        None when the search ran out of its budget before deciding.
    reason : str
        One sentence: what was found, or why none exists within the bound.
    tried : int
        Candidates examined (the one found included).
    integrators, compensator_states, new_inputs, start
        The extension found: integrators per delayed input, names of the compensator states
        and of the new inputs, the compensator states' values at the operating point.
    result : InputOutputResult or None
        The input-output analysis of the extended plant.
    largest_rank : int or None
        The largest generic rank seen over the candidates.
    envelope : EnvelopeResult or None
        The extended decoupling matrix over the extended envelope (the first compensator state of
        each delayed input over its input's limits), when the plant has an envelope and the
        matrix was formed; synthesis takes its sigma levels from it.
    """

    found: bool | None
    reason: str
    tried: int
    integrators: dict[str, int] = field(default_factory=dict)
    compensator_states: list[str] = field(default_factory=list)
    new_inputs: list[str] = field(default_factory=list)
    start: dict[str, float] = field(default_factory=dict)
    result: Any = None
    largest_rank: int | None = None
    envelope: Any = None

    def text_line(self) -> str:
        """The extension in one line of the text report (after ``dynamic extension:``).

        Returns
        -------
        str
        """
        if self.found is None:
            return self.reason
        if not self.found:
            return (f"none within {MAX_INTEGRATORS_PER_INPUT} integrators per input and {MAX_ADDED_STATES} in all "
                    f"({count(self.tried, 'candidate')}, largest rank {self.largest_rank})")
        io = self.result
        delays = ", ".join(f"{u} + {count(k, 'integrator')}" for u, k in self.integrators.items())
        at = ", ".join(f"{name}={value:g}" for name, value in self.start.items())
        here = "defined" if io.relative_degree is not None else "not defined (on the singular set)"
        return (f"{delays}: relative degree {io.relative_degree_generic}, {here} at the operating point "
                f"with {at}")

    def to_json(self) -> dict[str, Any]:
        """The ``dynamic_extension`` object under ``input_output`` in ``linz check --json``.

        Returns
        -------
        dict
        """
        io = self.result
        matrix = None if io is None or io.decoupling_matrix is None else show_matrix(io.decoupling_matrix)
        singular = None if io is None or io.singular_set is None else show(io.singular_set)
        return {
            "found": self.found,
            "integrators": dict(self.integrators),
            "compensator_states": list(self.compensator_states),
            "new_inputs": list(self.new_inputs),
            "compensator_start": dict(self.start),
            "relative_degree": None if io is None else io.relative_degree_generic,
            "relative_degree_at_operating_point": None if io is None else io.relative_degree,
            "decoupling_matrix": matrix,
            "singular_set": singular,
            "singular_set_note": "" if io is None else io.singular_set_note,
            "zero_dynamics_order": None if io is None else io.zero_dynamics_order,
            "at_operating_point": None if io is None else io.reason,
            **({"method": io.method} if io is not None and io.method else {}),
            "largest_rank": self.largest_rank,
            "envelope": None if self.envelope is None else self.envelope.to_json(),
            "tried": self.tried,
            "bound": {"integrators_per_input": MAX_INTEGRATORS_PER_INPUT, "added_states": MAX_ADDED_STATES},
            "reason": self.reason,
        }


def extension_candidates(m: int, per_input: int = MAX_INTEGRATORS_PER_INPUT,
                         total: int = MAX_ADDED_STATES) -> Iterator[tuple[int, ...]]:
    """Integrator counts per input, by increasing total, then earlier inputs delayed first.

    Parameters
    ----------
    m : int
        Number of inputs.
    per_input, total : int
        Integrators at most on one input and in all.

    Returns
    -------
    iterator of tuple of int
        Every count vector with a total from 1 to ``total``.

    Examples
    --------
    >>> list(extension_candidates(2, 2, 2))
    [(1, 0), (0, 1), (2, 0), (1, 1), (0, 2)]
    """
    for added in range(1, total + 1):
        yield from _counts_with_sum(m, added, per_input)


def _counts_with_sum(m: int, added: int, per_input: int) -> Iterator[tuple[int, ...]]:
    if m == 0:
        if added == 0:
            yield ()
        return
    for first in range(min(per_input, added), -1, -1):
        for rest in _counts_with_sum(m - 1, added - first, per_input):
            yield (first,) + rest


@dataclass(frozen=True)
class _Names:
    """Compensator-state and new-input names per input, clear of every name of the plant."""

    states: dict[str, list[str]]        # input -> [<u>_i1, ..., <u>_iK]
    inputs: dict[str, list[str]]        # input -> [<u>_d1, ..., <u>_dK]: the new input for k integrators


def _names(plant: Plant, per_input: int) -> _Names:
    taken = set(plant.state_names) | set(plant.input_names) | set(plant.output_names)
    taken |= {s.name for s in plant.parameters}

    def fresh(name: str) -> str:
        while name in taken:
            name += "_"
        taken.add(name)
        return name

    states = {u: [fresh(f"{u}_i{i}") for i in range(1, per_input + 1)] for u in plant.input_names}
    inputs = {u: [fresh(f"{u}_d{i}") for i in range(1, per_input + 1)] for u in plant.input_names}
    return _Names(states, inputs)


def extended_plant(plant: Plant, counts: tuple[int, ...], start: dict[str, float] | None = None,
                   per_input: int = MAX_INTEGRATORS_PER_INPUT) -> Plant:
    """The plant with input j delayed through ``counts[j]`` integrators.

    Parameters
    ----------
    plant : Plant
        An explicit plant (f and G formed).
    counts : tuple of int
        Integrators per input, each at most ``per_input``.
    start : dict or None
        Input name -> the value of its first compensator state at the operating point
        (0 where absent).
    per_input : int
        The largest count the names are made for.

    Returns
    -------
    Plant
        States (x, compensator states in input order), inputs in the plant's order with each
        delayed one replaced by its new input; same parameters and outputs.
    """
    names, start = _names(plant, per_input), start or {}
    f, G = sp.Matrix(plant.f), sp.zeros(plant.n, plant.m)
    states, inputs = list(plant.states), []
    chain_f: list[sp.Expr] = []
    chain_g: list[tuple[int, int]] = []              # (compensator row, input column) of each w_j
    envelope, point, limits = dict(plant.envelope), dict(plant.operating_point), {}
    for j, (u, k) in enumerate(zip(plant.input_names, counts)):
        if k == 0:
            G[:, j] = plant.G[:, j]
            inputs.append(plant.inputs[j])
            if u in plant.input_limits:
                limits[u] = plant.input_limits[u]
            continue
        xi = [sp.Symbol(name, real=True) for name in names.states[u][:k]]
        f += plant.G[:, j] * xi[0]
        states += xi
        chain_f += xi[1:] + [sp.Integer(0)]
        chain_g.append((len(states) - plant.n - 1, j))
        inputs.append(sp.Symbol(names.inputs[u][k - 1], real=True))
        point.update({s.name: (start.get(u, 0.0) if i == 0 else 0.0) for i, s in enumerate(xi)})
        if u in plant.input_limits:
            envelope[xi[0].name] = plant.input_limits[u]
    G_chain = sp.zeros(len(chain_f), plant.m)
    for row, column in chain_g:
        G_chain[row, column] = 1
    return replace(plant, states=tuple(states), inputs=tuple(inputs), f=f.col_join(sp.Matrix(chain_f)),
                   G=G.col_join(G_chain), input_limits=limits, envelope=envelope, operating_point=point,
                   design={}, signal_units={})


def _start_values(plant: Plant, ctx: NumericContext) -> dict[str, float]:
    """The first compensator state of each input at the operating point (module docstring)."""
    x0 = plant.operating_vector()
    f0, G0 = evaluate(plant.f, ctx, x0)[:, 0], evaluate(plant.G, ctx, x0)
    u0 = np.zeros(plant.m)
    if np.all(np.isfinite(f0)) and np.all(np.isfinite(G0)):
        solution, *_ = np.linalg.lstsq(G0, -f0, rcond=None)
        if np.linalg.norm(f0 + G0 @ solution) <= 1e-9 * (1 + np.linalg.norm(f0)):
            u0 = solution
    start = {}
    for j, u in enumerate(plant.input_names):
        lo_hi = plant.input_limits.get(u)
        start[u] = float(0.5 * (lo_hi[0] + lo_hi[1])) if lo_hi else float(u0[j]) + 0.0   # + 0.0: never -0
    return start


def _generic_rank(plant: Plant, ctx: NumericContext) -> int | None:
    """Generic rank of the decoupling matrix of ``plant`` (None: some output unreached, or not finite)."""
    jets = plant_jets(plant, ctx)
    try:
        rows = []
        for h in plant.h:
            degree, row, _ = lie_chain(h, plant, ctx, None if jets is None else SYMBOLIC_TREE_BUDGET)
            if degree is None:
                return None
            rows.append(row)
        return generic_rank(sp.Matrix.vstack(*rows), ctx).rank
    except BeyondSymbolicBudget:
        chains = numeric_chains(list(plant.h), plant, ctx, jets)
        return None if None in chains.degrees else sampled_generic_rank(chains.rows_samples).rank


def _search_monitor(ctx: NumericContext) -> Monitor:
    """The search's own CPU limit, ending no later than the analysis budget; same progress reports."""
    outer = getattr(ctx, "monitor", None)
    seconds = EXTENSION_SECONDS
    if outer is not None and outer.seconds is not None:
        seconds = min(seconds, max(0.0, outer.seconds - (time.process_time() - outer.started)))
    return Monitor(seconds, None if outer is None else outer.report)


def search_dynamic_extension(plant: Plant, ctx: NumericContext,
                             analyse: Callable[[Plant, NumericContext], Any]) -> DynamicExtension:
    """The first dynamic extension (bounded search) whose decoupling matrix has full generic rank.

    Parameters
    ----------
    plant : Plant
        An explicit square plant whose decoupling matrix has deficient generic rank.
    ctx : NumericContext
        The plant's context; its monitor's budget bounds the search too.
    analyse : callable
        (extended plant, its context) -> InputOutputResult, without a search of its own:
        states the extension found the way the static analysis states a plant.

    Returns
    -------
    DynamicExtension
    """
    p = plant.h.shape[0]
    start, monitor = _start_values(plant, ctx), _search_monitor(ctx)
    candidates = list(extension_candidates(plant.m))
    tried, largest = 0, None
    try:
        for counts in candidates:
            monitor.check("dynamic extension search", tried / len(candidates))
            tried += 1
            extended = extended_plant(plant, counts, start)
            ectx = replace(plant_context(extended), monitor=monitor)
            rank = _generic_rank(extended, ectx)
            if rank is not None:
                largest = rank if largest is None else max(largest, rank)
            if rank == p:
                return _found(plant, counts, extended, analyse(extended, ectx), tried, largest)
    except BudgetExceeded as stop:
        return DynamicExtension(None, f"could not decide within the budget ({stop.seconds:g} s) of the dynamic-"
                                      f"extension search: stopped after {tried} of "
                                      f"{count(len(candidates), 'candidate')}", tried, largest_rank=largest)
    return DynamicExtension(False, _none_reason(p, tried, largest), tried, largest_rank=largest)


def _none_reason(p: int, tried: int, largest: int | None) -> str:
    bound = (f"no extension with at most {count(MAX_INTEGRATORS_PER_INPUT, 'integrator')} per input and "
             f"{MAX_ADDED_STATES} in all gives a decoupling matrix of full rank")
    if largest is None:
        return f"{bound}: the extended decoupling matrices are not finite at any sample"
    return (f"{bound}: its rank stays at most {largest} < {p} in all {count(tried, 'candidate')} because the "
            f"outputs' highest derivatives see the inputs through at most "
            f"{count(largest, 'independent combination')} whatever the delays (as when one output is the rate "
            f"of another)")


def _nouns(names: list[str], noun: str) -> str:
    return f"{noun} {names[0]}" if len(names) == 1 else f"{noun}s {', '.join(names)}"


def _found(plant: Plant, counts: tuple[int, ...], extended: Plant, io: Any, tried: int,
           largest: int | None) -> DynamicExtension:
    delayed = [(u, k) for u, k in zip(plant.input_names, counts) if k]
    added = extended.state_names[plant.n:]
    new_inputs = [w.name for w, k in zip(extended.inputs, counts) if k]
    start = {s: extended.operating_point[s] for s in added}
    what = " and ".join(f"{count(k, 'integrator')} on {u}" for u, k in delayed)
    if io.singular_set is None:
        where = "its singular set not formed"
    elif io.singular_set == 1:
        where = "nonsingular everywhere"
    else:
        where = "singular " + describe_singular_set(io.singular_set, "det A")
    reason = (f"a dynamic extension decouples them: {what} ({_nouns(added, 'compensator state')}; "
              f"{_nouns(new_inputs, 'new input')}) gives relative degree "
              f"{io.relative_degree_generic} and a decoupling matrix of full rank {len(plant.output_names)}, "
              f"{where}; zero dynamics of order {io.zero_dynamics_order}")
    envelope = None
    if extended.envelope and io.decoupling_matrix is not None:
        envelope = sample_envelope(extended, io.decoupling_matrix, "decoupling matrix of the extended plant",
                                   EXTENSION_ENVELOPE_SAMPLES)
    return DynamicExtension(True, reason, tried, dict(delayed), added, new_inputs, start, io, largest, envelope)
