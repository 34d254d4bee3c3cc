"""Numeric Lie derivatives and iterated brackets at sample points, by Taylor-mode propagation.

Symbolic Lie-derivative chains and brackets grow exponentially with the order (the
expanded tree of L_f^12 h of a 12-state pendulum chain prints to megabytes); their
values at a point do not. Along the flow x(t) of f from x0,

- ``L_f^k h(x0) = k! [t^k] h(x(t))`` (the Taylor coefficients of ``h`` along the flow);
- with ``Y(t) = (dPhi_t/dx0)^-1``, ``dY/dt = -Y Df(x(t))``, ``Y(0) = I``, the pulled-back
  field ``V(t) = Y(t) g(x(t))`` has ``[t^k] V = ad_f^k g(x0) / k!`` (the Lie derivative of
  g along f: ``ad_f g = [f, g] = (dg/dx) f - (df/dx) g``, Isidori sec. 1.2);
- directional derivatives of either come from a complex step, ``DF(x) v =
  Im F(x + i eps v) / eps`` (exact to rounding for analytic F).

Each costs O(K^2) passes over the expressions of f, G and the (small, symbolic) Jacobian
of f; the sympy trees are walked once into a :class:`JetProgram` of
``linz_ros.artifact.taylor`` calls. Every function is vectorised over a batch of points.
"""

from __future__ import annotations

from typing import Callable, Sequence

import numpy as np
import sympy as sp

from linz_ros.artifact import taylor

__all__ = ["JetProgram", "UnsupportedExpression", "PlantJets"]

_FUNCTIONS: dict[type, Callable] = {
    sp.sin: taylor.sin, sp.cos: taylor.cos, sp.tan: taylor.tan, sp.exp: taylor.exp, sp.log: taylor.log,
    sp.sinh: taylor.sinh, sp.cosh: taylor.cosh, sp.tanh: taylor.tanh, sp.asin: taylor.asin,
    sp.acos: taylor.acos, sp.atan: taylor.atan, sp.atan2: taylor.atan2, sp.Abs: taylor.abs_,
    sp.sign: taylor.sign,
}

Value = "np.ndarray | complex"


class UnsupportedExpression(ValueError):
    """An expression the jet walker cannot evaluate (a function outside the plant grammar)."""


def _is_jet(value) -> bool:
    return np.ndim(value) > 0


def _add(values: list) -> Value:
    jets = [v for v in values if _is_jet(v)]
    number = sum((v for v in values if not _is_jet(v)), 0.0)
    if not jets:
        return number
    total = jets[0]
    for jet in jets[1:]:
        total = total + jet
    return taylor.add_constant(total, number) if number != 0 else total


def _product(values: list) -> Value:
    result: Value = 1.0
    for value in values:
        result = taylor.mul(result, value) if _is_jet(result) and _is_jet(value) else result * value
    return result


def _power(base: Value, exponent: Value) -> Value:
    if not _is_jet(base) and not _is_jet(exponent):
        return complex(base) ** complex(exponent) if isinstance(base, complex) else base ** exponent
    if _is_jet(exponent):
        log_base = taylor.log(base) if _is_jet(base) else complex(np.log(complex(base)))
        return taylor.exp(taylor.mul(exponent, log_base) if _is_jet(log_base) else exponent * log_base)
    p = float(exponent)
    if p.is_integer():
        return taylor.integer_power(base, int(p))
    return taylor.sqrt(base) if p == 0.5 else taylor.power(base, p)


def _apply(function: Callable, values: list) -> Value:
    if not any(_is_jet(v) for v in values):
        raise UnsupportedExpression("a function of constants only should have been folded")
    like = next(v for v in values if _is_jet(v))
    return function(*(v if _is_jet(v) else taylor.constant(v, like) for v in values))


class JetProgram:
    """Sympy expressions of the coordinates compiled once into a straight-line program of jets.

    Shared subexpressions are computed once (the walk is over the expression DAG).

    Parameters
    ----------
    expressions : sequence of sympy.Expr
    coordinates : sequence of sympy.Symbol
    constants : dict
        Symbol -> value for every other symbol.

    Raises
    ------
    UnsupportedExpression
        For a symbol or function the walker does not know.
    """

    def __init__(self, expressions: Sequence[sp.Expr], coordinates: Sequence[sp.Symbol], constants: dict) -> None:
        self._index = {s: i for i, s in enumerate(coordinates)}
        self._constants = {s: sp.Float(float(v), 17) if sp.sympify(v).is_real else sp.sympify(v)
                           for s, v in constants.items()}
        self._steps: list[tuple[Callable, tuple[int, ...]]] = []
        self._slots: dict[sp.Basic, int] = {}
        self._outputs = [self._slot(sp.sympify(e).xreplace(self._constants)) for e in expressions]

    def _emit(self, node: sp.Basic, step: Callable, args: tuple[int, ...]) -> int:
        self._steps.append((step, args))
        self._slots[node] = len(self._steps) - 1
        return self._slots[node]

    def _slot(self, node: sp.Basic) -> int:
        if node in self._slots:
            return self._slots[node]
        if node.is_Symbol:
            if node not in self._index:
                raise UnsupportedExpression(f"unknown symbol {node}")
            i = self._index[node]
            return self._emit(node, lambda x, i=i: x[i], ())
        if not node.free_symbols:
            value = complex(node.evalf(17))
            value = value.real if value.imag == 0 else value
            return self._emit(node, lambda x, v=value: v, ())
        args = tuple(self._slot(a) for a in node.args)
        if node.is_Add:
            return self._emit(node, lambda x, *v: _add(list(v)), args)
        if node.is_Mul:
            return self._emit(node, lambda x, *v: _product(list(v)), args)
        if node.is_Pow:
            return self._emit(node, lambda x, b, e: _power(b, e), args)
        function = _FUNCTIONS.get(node.func)
        if function is None:
            raise UnsupportedExpression(f"no jet rule for {node.func.__name__}")
        return self._emit(node, lambda x, *v, fn=function: _apply(fn, list(v)), args)

    def __call__(self, x: Sequence[np.ndarray]) -> list:
        """Evaluate on jets of the coordinates.

        Parameters
        ----------
        x : sequence of numpy.ndarray
            One jet per coordinate, all of one order and batch shape.

        Returns
        -------
        list
            One jet (or a number, for a constant expression) per expression.
        """
        values: list = []
        for step, args in self._steps:
            with np.errstate(all="ignore"):
                values.append(step(x, *(values[a] for a in args)))
        return [values[o] for o in self._outputs]


def _as_jets(values: list, like: np.ndarray) -> np.ndarray:
    """Stack program results (jets or numbers) to one array (K+1, len(values), *batch)."""
    return np.stack([v if _is_jet(v) else taylor.constant(v, like) for v in values], axis=1)


class PlantJets:
    """Numeric Lie derivatives and brackets of a control-affine plant ``x' = f(x) + G(x) u``.

    Points are passed as arrays of shape (B, n); results carry the batch axis B after the
    order axis.

    Parameters
    ----------
    f : sympy.Matrix
        Drift, n x 1.
    G : sympy.Matrix
        Input matrix, n x m.
    coordinates : sequence of sympy.Symbol
    constants : dict
        Symbol -> value of every parameter.

    Raises
    ------
    UnsupportedExpression
        When f or G uses a function the jet walker does not know.
    """

    def __init__(self, f: sp.Matrix, G: sp.Matrix, coordinates: Sequence[sp.Symbol], constants: dict) -> None:
        self.n, self.m = G.shape
        self.coordinates, self.constants = tuple(coordinates), dict(constants)
        X = sp.Matrix(coordinates)
        self._f = JetProgram(list(f), coordinates, constants)
        self._G = JetProgram(list(G), coordinates, constants)
        self._Df = JetProgram(list(f.jacobian(X)), coordinates, constants)

    def program(self, expressions: Sequence[sp.Expr]) -> JetProgram:
        """A :class:`JetProgram` of functions of the plant's coordinates and parameters.

        Parameters
        ----------
        expressions : sequence of sympy.Expr

        Returns
        -------
        JetProgram
        """
        return JetProgram(list(expressions), self.coordinates, self.constants)

    def _flow(self, points: np.ndarray, order: int) -> np.ndarray:
        """Taylor coefficients of x(t) from each point: (order+1, n, B)."""
        with np.errstate(all="ignore"):
            return taylor.flow(self._f, np.asarray(points).T, order)

    def input_fields(self, points: np.ndarray) -> np.ndarray:
        """G at the points: (B, n, m).

        Parameters
        ----------
        points : numpy.ndarray
            B x n.

        Returns
        -------
        numpy.ndarray
        """
        x = np.asarray(points, dtype=float).T[None]
        return _as_jets(self._G([x[:, i] for i in range(self.n)]), x[:, 0])[0].T.reshape(-1, self.n, self.m)

    def lie_values(self, h: JetProgram, points: np.ndarray, order: int) -> np.ndarray:
        """``L_f^k h_i`` at the points for k = 0 .. order: (order+1, outputs, B).

        Parameters
        ----------
        h : JetProgram
        points : numpy.ndarray
            B x n, real or complex (a complex step).
        order : int

        Returns
        -------
        numpy.ndarray
        """
        x = self._flow(points, order)
        with np.errstate(all="ignore"):
            values = _as_jets(h([x[:, i] for i in range(self.n)]), x[:, 0])
        return values * taylor.factorials(order).reshape(-1, 1, 1)

    def lie_gradients(self, h: JetProgram, points: np.ndarray, order: int) -> np.ndarray:
        """Gradients ``d(L_f^k h_i)`` at the points, by n complex steps: (order+1, outputs, B, n).

        Parameters
        ----------
        h : JetProgram
        points : numpy.ndarray
            B x n.
        order : int

        Returns
        -------
        numpy.ndarray
        """
        points = np.asarray(points, dtype=float)
        return self._stepped_lie_values(h, points, np.broadcast_to(np.eye(self.n), (len(points), self.n, self.n)),
                                        order)

    def input_lie_values(self, h: JetProgram, points: np.ndarray, order: int) -> np.ndarray:
        """``L_gj L_f^k h_i`` at the points by complex steps along each g_j: (order+1, outputs, B, m).

        Parameters
        ----------
        h : JetProgram
        points : numpy.ndarray
            B x n.
        order : int

        Returns
        -------
        numpy.ndarray
        """
        points = np.asarray(points, dtype=float)
        return self._stepped_lie_values(h, points, np.swapaxes(self.input_fields(points), 1, 2), order)

    def _stepped_lie_values(self, h: JetProgram, points: np.ndarray, directions: np.ndarray,
                            order: int) -> np.ndarray:
        """D(L_f^k h_i)(x) v for B x d directions v: (order+1, outputs, B, d), by complex steps."""
        B, d = directions.shape[:2]
        stepped = points[:, None, :] + 1j * taylor.COMPLEX_STEP * directions
        values = self.lie_values(h, stepped.reshape(B * d, self.n), order)
        return values.imag.reshape(order + 1, values.shape[1], B, d) / taylor.COMPLEX_STEP

    def ad_values(self, points: np.ndarray, order: int) -> np.ndarray:
        """``ad_f^k g_j`` at the points for k = 0 .. order: (order+1, B, n, m).

        Parameters
        ----------
        points : numpy.ndarray
            B x n, real or complex (a complex step).
        order : int

        Returns
        -------
        numpy.ndarray
        """
        x = self._flow(points, order)
        jets = [x[:, i] for i in range(self.n)]
        like = x[:, 0]
        with np.errstate(all="ignore"):
            Df = np.moveaxis(_as_jets(self._Df(jets), like), -1, 1).reshape(order + 1, -1, self.n, self.n)
            G = np.moveaxis(_as_jets(self._G(jets), like), -1, 1).reshape(order + 1, -1, self.n, self.m)
            Y = np.zeros_like(Df)
            Y[0] = np.eye(self.n)
            for k in range(order):       # Y' = -Y Df, so (k+1) Y_(k+1) = -sum_a Y_a Df_(k-a)
                Y[k + 1] = -sum(Y[a] @ Df[k - a] for a in range(k + 1)) / (k + 1)
            V = np.stack([sum(Y[a] @ G[k - a] for a in range(k + 1)) for k in range(order + 1)])
        return V * taylor.factorials(order).reshape(-1, 1, 1, 1)

    def ad_directional(self, points: np.ndarray, directions: np.ndarray, order: int) -> np.ndarray:
        """Derivatives ``D(ad_f^k g_j)(x) v`` along given directions by a complex step.

        Parameters
        ----------
        points : numpy.ndarray
            B x n.
        directions : numpy.ndarray
            B x d x n: d directions at each point.
        order : int

        Returns
        -------
        numpy.ndarray
            (order+1, B, d, n, m).
        """
        points = np.asarray(points, dtype=float)
        B, d = directions.shape[:2]
        stepped = points[:, None, :] + 1j * taylor.COMPLEX_STEP * directions
        values = self.ad_values(stepped.reshape(B * d, self.n), order)
        return values.imag.reshape(order + 1, B, d, self.n, self.m) / taylor.COMPLEX_STEP
