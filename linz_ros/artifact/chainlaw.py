"""The law of an explicit plant whose Lie-derivative chains are too large to print, evaluated
from f, G and h at each step (numpy only).

Such an artifact has ``design.law_form: "chain"``: its ``law`` program carries the outputs h
only, its ``dynamics`` program f and G, both in the grammar. Each step runs them through the
compiler's ``taylor`` backend (truncated Taylor arithmetic, :mod:`linz_ros.artifact.taylor`):
along the flow x(t) of f from x,

    L_f^k h_i(x) = k! [t^k] h_i(x(t)),     k = 0 .. r_i,

gives the chains y_i, ..., y_i^(r_i - 1) and b_i = L_f^(r_i) h_i, and a complex step along
each column g_j of G, x + i eps g_j (eps = ``taylor.COMPLEX_STEP``), gives the decoupling
matrix ``A_ij = L_gj L_f^(r_i - 1) h_i(x) = Im(L_f^(r_i - 1) h_i(x + i eps g_j)) / eps``, exact
to rounding for analytic f and h (Squire and Trapp, SIAM Review 40, 1998). The real parts of
the same stepped flow are the real chains to rounding (their error is O(eps^2)), so one flow
of the m stepped points, to order max r_i, gives every term: O(r^2) passes over f per step,
no symbolic Lie derivative anywhere.

It lives in the seam because both towers need the same numbers: the runtime core steps with it,
and the build verifies it against an independent evaluation.
"""

from __future__ import annotations

from typing import Callable, Sequence

import numpy as np

from linz_ros.artifact import taylor
from linz_ros.artifact.compiler import OutputSlot, Program, compile_program

__all__ = ["LAW_FORMS", "CHAIN_LAW_OUTPUTS", "ChainLaw", "chain_law"]

#: ``design.law_form`` of an artifact: the law's terms as expressions (the default, older
#: artifacts have no such field), or evaluated from f, G and h at run time.
LAW_FORMS = ("expressions", "chain")
#: The ``law`` program's one output in the chain form: the outputs h.
CHAIN_LAW_OUTPUTS = ("h",)


class ChainLaw:
    """``law(x, p)`` -> A (m x m, flat), b (m) and the chains, as the law program of the expression form.

    Parameters
    ----------
    f_jets : Program
        The ``dynamics`` program's f, compiled with the ``taylor`` backend.
    h_jets : Program
        The ``law`` program's h, compiled with the ``taylor`` backend.
    G : Program
        The ``dynamics`` program compiled with the ``math`` backend (f, then G).
    degrees : sequence of int
        Relative degree of each output.

    Attributes
    ----------
    slots : dict of str -> OutputSlot
        ``A``, ``b`` and ``chain`` (y_i .. y_i^(r_i - 1), chain after chain) of the result.
    """

    def __init__(self, f_jets: Program, h_jets: Program, G: Program, degrees: Sequence[int]) -> None:
        self._f, self._h, self._G = f_jets.function, h_jets.function, G.function
        self.degrees = [int(r) for r in degrees]
        self.m = len(self.degrees)
        self.n = len(f_jets.arguments[0][1])
        self._g_offset = G.slots["G"].offset
        self._order = max(self.degrees)
        self._factorials = taylor.factorials(self._order)
        m = self.m
        self.slots = {"A": OutputSlot("A", (m, m), 0), "b": OutputSlot("b", (m,), m * m),
                      "chain": OutputSlot("chain", (sum(self.degrees),), m * m + m)}

    def __call__(self, x: Sequence[float], p: Sequence[float]) -> tuple:
        """A (row-major), b and the chains at state ``x`` and parameters ``p``.

        Parameters
        ----------
        x, p : sequence of float

        Returns
        -------
        tuple of float
            nan where the model is not defined (the core refuses non-finite values).

        Raises
        ------
        ArithmeticError, ValueError
            From the scalar parts of the programs (a parameter outside a function's domain).
        """
        A, b, chains = self.terms(x, p)
        return tuple(A.ravel().tolist()) + tuple(b.tolist()) + tuple(chains)

    def terms(self, x: Sequence[float], p: Sequence[float]) -> tuple[np.ndarray, np.ndarray, list[float]]:
        """The decoupling matrix, b and the flat chains at ``x``.

        Parameters
        ----------
        x, p : sequence of float

        Returns
        -------
        A : numpy.ndarray
            m x m.
        b : numpy.ndarray
            m.
        chains : list of float
        """
        n, m, p = self.n, self.m, list(p)
        values = self._G(list(x), p)
        G = np.array(values[self._g_offset:self._g_offset + n * m], dtype=float).reshape(n, m)
        # one stepped point per input: x + i eps g_j (batch axis of the jets)
        start = np.asarray(x, dtype=float)[:, None] + 1j * taylor.COMPLEX_STEP * G
        with np.errstate(all="ignore"):
            flow = taylor.flow(lambda jets: self._f(jets, p), start, self._order)
            outputs = self._h([flow[:, i] for i in range(n)], p)
        A, b, chains = np.empty((m, m)), np.empty(m), []
        for i, (output, r) in enumerate(zip(outputs, self.degrees)):
            coefficients = (np.asarray(output) if np.ndim(output)
                            else taylor.constant(output, flow[:, 0])) * self._factorials[:, None]
            chains.extend(coefficients[:r, 0].real.tolist())
            b[i] = coefficients[r, 0].real
            A[i] = coefficients[r - 1].imag / taylor.COMPLEX_STEP
        return A, b, chains


def chain_law(name: str, program_text: Callable[[str], tuple], degrees: Sequence[int]) -> ChainLaw:
    """The chain-form law of an artifact: f and h compiled with the taylor backend.

    Parameters
    ----------
    name : str
        For messages (the artifact's source).
    program_text : callable
        Program name -> ``(arguments, temporaries, outputs)`` as written in the artifact.
    degrees : sequence of int

    Returns
    -------
    ChainLaw
    """
    arguments, temporaries, outputs = program_text("dynamics")
    f_only = [out for out in outputs if out[0] == "f"]
    f_jets = compile_program(f"{name}: dynamics f (jets)", arguments, temporaries, f_only, backend="taylor")
    G = compile_program(f"{name}: dynamics", arguments, temporaries, outputs)
    arguments, temporaries, outputs = program_text("law")
    h_jets = compile_program(f"{name}: law h (jets)", arguments, temporaries, outputs, backend="taylor")
    return ChainLaw(f_jets, h_jets, G, degrees)
