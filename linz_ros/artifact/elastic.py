"""The law of an elastic-joint arm, assembled from the artifact's programs (numpy only).

It lives in the seam because two towers need the very same numbers: the runtime core
steps with it, and the build verifies it against a symbolic evaluation of the closed form.

Model (``model._elastic``): ``M(q) q'' = F(q, q') + K (theta - q)`` and
``J theta'' = u - K (theta - q) - D theta'``. Differentiating the link equation twice
along the motion (Spong, ASME J. Dyn. Sys. Meas. Control 109, 1987, sec. 4),

    M q'''' + 2 M' q''' + M'' q'' = F'' + K (theta'' - q''),

so with y = q the outputs have relative degree 4 each, ``y'''' = A u + b`` with the
decoupling matrix ``A = M^-1 K J^-1`` and

    b = M^-1 (F'' - 2 M' q''' - M'' q'' - K q'' - K J^-1 (K (theta - q) + D theta')),

where ``q'' = M^-1 (F + K (theta - q))`` and ``q''' = M^-1 (K (theta' - q') + F' - M' q'')``.
M', M'', F', F'' are time derivatives along the motion, read off the Taylor coefficients
of the ``law`` program compiled with the compiler's ``jet2`` backend (scalar second-order
jets), for q(t) = q + q' t + q'' t^2/2 and v(t) = q' + q'' t + q''' t^2/2. The program
runs order by order (``Program.phases``): order 0 gives the law's values and so q'',
order 1 gives M' and F' and so q''' (the order-2 input of v), order 2 gives M'' and F''.
One pass per step; M^-1 only as linear solves.
"""

from __future__ import annotations

from typing import Callable, Sequence

import numpy as np

from linz_ros.artifact.compiler import OutputSlot, Program, compile_program

__all__ = ["ELASTIC_CONSTANTS", "ElasticLaw", "elastic_law"]

#: The law program's per-joint constants of an elastic-joint arm (diagonals of K, J, D).
ELASTIC_CONSTANTS = ("stiffness", "motor_inertia", "motor_damping")


class ElasticLaw:
    """``law(x, p)`` -> the law program's values, then A (m x m, flat), b (m) and the chains.

    Parameters
    ----------
    jets : Program
        The artifact's ``law`` program compiled with the ``jet2`` backend (M, F, the
        constants, chain).
    nq : int
        Joints.

    Attributes
    ----------
    slots : dict of str -> OutputSlot
        The law program's slots, then ``A``, ``b`` and ``chain`` (y, y', y'', y''' per
        joint) of the extended result.
    """

    def __init__(self, jets: Program, nq: int) -> None:
        self._phases, self.nq = jets.phases, nq
        self._offsets = {name: jets.slots[name].offset for name in ("M", "F") + ELASTIC_CONSTANTS}
        size = jets.size
        self.slots = {k: v for k, v in jets.slots.items() if k != "chain"}
        self.slots["A"] = OutputSlot("A", (nq, nq), size)
        self.slots["b"] = OutputSlot("b", (nq,), size + nq * nq)
        self.slots["chain"] = OutputSlot("chain", (4 * nq,), size + nq * nq + nq)
        # the motor side's coefficients: M and F depend on the link side (q, q') only
        self._motor = [0.0] * (2 * nq)

    def __call__(self, x: Sequence[float], p: Sequence[float]) -> tuple:
        """The extended values at state ``x`` and parameters ``p``.

        Parameters
        ----------
        x, p : sequence of float

        Returns
        -------
        tuple of float

        Raises
        ------
        ArithmeticError, ValueError
            Where the model is not defined, or M is singular.
        """
        terms = self.terms(x, p)
        return (terms["values"] + tuple(terms["A"].ravel().tolist()) + tuple(terms["b"].tolist())
                + tuple(terms["chain"].tolist()))

    def terms(self, x: Sequence[float], p: Sequence[float]) -> dict:
        """The law program's values, A, b, q'', q''' and the chains at ``x``.

        Parameters
        ----------
        x, p : sequence of float

        Returns
        -------
        dict
            ``values`` (the law program's values, a tuple), and arrays ``A``, ``b``,
            ``qdd``, ``qddd``, ``chain`` and the derivatives along the motion ``M1``,
            ``M2``, ``F1``, ``F2`` (M', M'', F', F'').
        """
        nq, nn = self.nq, self.nq * self.nq
        om, of = self._offsets["M"], self._offsets["F"]
        run = self._phases(x, p)
        values = next(run)
        M = np.array(values[om:om + nn]).reshape(nq, nq)
        F = np.array(values[of:of + nq])
        K, Jm, D = (np.array(values[self._offsets[k]:self._offsets[k] + nq]) for k in ELASTIC_CONSTANTS)
        state = np.array(x, dtype=float)
        q, qd, th, thd = state[:nq], state[nq:2 * nq], state[2 * nq:3 * nq], state[3 * nq:]
        spring = K * (th - q)
        qdd = np.linalg.solve(M, F + spring)
        first = run.send(qd.tolist() + qdd.tolist() + self._motor)          # q -> q', v -> q''
        M1 = np.array(first[om:om + nn]).reshape(nq, nq)
        F1 = np.array(first[of:of + nq])
        qddd = np.linalg.solve(M, K * (thd - qd) + F1 - M1 @ qdd)
        second = run.send((0.5 * qdd).tolist() + (0.5 * qddd).tolist() + self._motor)
        M2 = 2.0 * np.array(second[om:om + nn]).reshape(nq, nq)
        F2 = 2.0 * np.array(second[of:of + nq])
        drift = F2 - 2.0 * M1 @ qddd - M2 @ qdd - K * qdd - K / Jm * (spring + D * thd)
        solved = np.linalg.solve(M, np.column_stack([np.diag(K / Jm), drift]))
        chain = np.stack([q, qd, qdd, qddd], axis=1).ravel()
        return {"values": values, "A": solved[:, :nq], "b": solved[:, nq], "qdd": qdd, "qddd": qddd,
                "chain": chain, "M1": M1, "M2": M2, "F1": F1, "F2": F2}


def elastic_law(name: str, program_text: Callable[[str], tuple], nq: int) -> ElasticLaw:
    """The elastic law of an artifact: its ``law`` program compiled with the jet2 backend.

    Parameters
    ----------
    name : str
        For messages (the artifact's source).
    program_text : callable
        Program name -> ``(arguments, temporaries, outputs)`` as written in the artifact.
    nq : int

    Returns
    -------
    ElasticLaw
    """
    arguments, temporaries, outputs = program_text("law")
    jets = compile_program(f"{name}: law (jets)", arguments, temporaries, outputs, backend="jet2")
    return ElasticLaw(jets, nq)
