"""Reference generators: y_ref and its derivatives up to each chain's relative degree.

A reference for chains of relative degrees ``r_1 .. r_p`` is sampled as one flat list:
``[y1, y1', ..., y1^(r1), y2, ..., y2^(r2), ...]`` (``r_i + 1`` numbers per chain), which is
what :meth:`linz_ros.runtime.ControllerCore.step` takes.

Kinds
-----
hold     constant at the base value (derivatives zero)
step     base, then base + amplitude from time ``at`` (derivatives zero)
sine     base + amplitude sin(2 pi (t - at) / period) from time ``at``
smooth   base to base + amplitude over ``duration`` from ``at`` along the polynomial
         of degree 2k+1 whose first k derivatives vanish at both ends (k = the largest
         relative degree, so every derivative the law uses is continuous)
ring     a closed path for vehicles, drawn by the first two outputs (x, y), the others
         held: a circle of radius ``amplitude`` through the base point, once per
         ``period``, x = x0 + a sin(w tau), y = y0 + a (1 - cos(w tau))
eight    the figure eight through the base point: x = x0 + a sin(w tau),
         y = y0 + (a/2) sin(2 w tau) (Gerono's lemniscate), once per ``period``

Every derivative of the closed paths is analytic (d^j/dt^j sin(w t) = w^j sin(w t + j pi/2)),
so chains of any relative degree get their whole reference.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Sequence

import numpy as np

from linz_ros.errors import ConfigError

__all__ = ["Reference", "make_reference", "parse_reference", "extrapolate_reference", "KINDS", "PATHS"]

KINDS = ("hold", "step", "sine", "smooth", "ring", "eight")
#: Kinds that draw a path with the first two outputs.
PATHS = ("ring", "eight")
#: Shortest period or duration accepted (seconds).
_SHORTEST = 1e-4
#: Longest time a reference's start, period or duration may take (seconds; about 11 days):
#: the smooth move's polynomial takes powers of its duration.
_LONGEST = 1e6
_OPTIONS = {"hold": (), "step": ("amplitude", "at"), "sine": ("amplitude", "period", "at"),
            "smooth": ("amplitude", "duration", "at"), "ring": ("amplitude", "period", "at"),
            "eight": ("amplitude", "period", "at")}


def _smoothstep_coefficients(k: int) -> np.ndarray:
    """Coefficients (lowest first) of the degree-(2k+1) polynomial s on [0, 1] with s(0) = 0,
    s(1) = 1 and s^(j)(0) = s^(j)(1) = 0 for j = 1..k (the 'smoothstep' family)."""
    degree = 2 * k + 1
    rows, rhs = [], []
    for j in range(k + 1):
        for end in (0.0, 1.0):
            row = np.zeros(degree + 1)
            for i in range(j, degree + 1):
                falling = math.prod(range(i - j + 1, i + 1))
                row[i] = falling * (end ** (i - j) if i - j > 0 else 1.0)
            rows.append(row)
            rhs.append(1.0 if (j == 0 and end == 1.0) else 0.0)
    return np.linalg.solve(np.array(rows), np.array(rhs))


@dataclass
class Reference:
    """A reference for several chains; :meth:`sample` gives the flat vector at time t.

    Attributes
    ----------
    kind : str
        One of :data:`KINDS`.
    orders : list of int
        Relative degree of each chain.
    base : list of float
        Value of each output before the reference moves (usually y at the start).
    amplitude : list of float
        Per chain.
    at : float
        Start time of the move, seconds.
    period, duration : float
        For ``sine`` and ``smooth``.
    """

    kind: str
    orders: list[int]
    base: list[float]
    amplitude: list[float]
    at: float = 0.0
    period: float = 2.0
    duration: float = 2.0
    _poly: list[np.ndarray] = field(default_factory=list, repr=False)
    _horner: list[list[float]] = field(default_factory=list, repr=False)

    def __post_init__(self) -> None:
        if self.kind == "smooth":
            coefficients = _smoothstep_coefficients(max(self.orders))
            self._poly = [coefficients]
            for _ in range(max(self.orders)):
                c = self._poly[-1]
                self._poly.append(c[1:] * np.arange(1, len(c)))
            # highest power first, as floats: Horner's rule in plain Python, the arithmetic of
            # numpy.polyval (y = y * s + c from y = 0) without its per-call cost
            self._horner = [[float(v) for v in c[::-1]] for c in self._poly]

    @property
    def size(self) -> int:
        """Length of the sampled vector, ``sum(r_i + 1)``."""
        return sum(r + 1 for r in self.orders)

    def sample(self, t: float) -> list[float]:
        """The flat reference vector at time ``t``.

        Parameters
        ----------
        t : float

        Returns
        -------
        list of float
        """
        out: list[float] = []
        if self.kind in PATHS:
            for i, (r, base) in enumerate(zip(self.orders, self.base)):
                out.extend(self._path(t, i, r, base))
            return out
        for r, base, amp in zip(self.orders, self.base, self.amplitude):
            out.extend(self._chain(t, r, base, amp))
        return out

    def _path(self, t: float, i: int, r: int, base: float) -> list[float]:
        """Chain ``i`` of a closed path (x for i = 0, y for i = 1, the others held)."""
        values = [base] + [0.0] * r
        tau = t - self.at
        if tau < 0 or i > 1:
            return values
        a, w = self.amplitude[0], 2.0 * math.pi / self.period
        if i == 0:                                   # x = a sin(w tau) for both paths
            terms = [(a, w, 0.0)]
        elif self.kind == "ring":                    # y = a - a cos(w tau) = a - a sin(w tau + pi/2)
            values[0] += a
            terms = [(-a, w, math.pi / 2)]
        else:                                        # y = (a/2) sin(2 w tau)
            terms = [(0.5 * a, 2.0 * w, 0.0)]
        for scale, rate, phase in terms:
            for j in range(r + 1):
                values[j] += scale * rate ** j * math.sin(rate * tau + phase + j * math.pi / 2)
        return values

    def _chain(self, t: float, r: int, base: float, amp: float) -> list[float]:
        values = [base] + [0.0] * r
        tau = t - self.at
        if self.kind == "hold" or tau < 0:
            return values
        if self.kind == "step":
            values[0] = base + amp
            return values
        if self.kind == "sine":
            w = 2.0 * math.pi / self.period
            for j in range(r + 1):
                # d^j/dt^j sin(w tau) = w^j sin(w tau + j pi/2)
                values[j] += amp * w ** j * math.sin(w * tau + j * math.pi / 2)
            return values
        s = min(tau / self.duration, 1.0)
        for j in range(r + 1):
            if tau >= self.duration and j > 0:
                break
            y = 0.0
            for coefficient in self._horner[j]:
                y = y * s + coefficient
            values[j] += amp * y / self.duration ** j
        return values


def make_reference(kind: str, orders: Sequence[int], base: Sequence[float],
                   amplitude: Sequence[float] | float = 0.0, at: float = 0.0, period: float = 2.0,
                   duration: float = 2.0) -> Reference:
    """Build a reference, checking every setting.

    Parameters
    ----------
    kind : str
        One of :data:`KINDS`.
    orders : sequence of int
        Relative degree per chain.
    base : sequence of float
        Per chain.
    amplitude : float or sequence of float
        One value for every chain, or one per chain.
    at, period, duration : float
        Seconds; period and duration must be positive.

    Returns
    -------
    Reference

    Raises
    ------
    ConfigError
        Naming the setting that is out of range.

    Examples
    --------
    >>> ref = make_reference("smooth", [2], [0.0], 1.0, duration=2.0)
    >>> [round(v, 6) for v in ref.sample(0.5)], ref.sample(5.0)
    ([0.103516, 0.527344, 1.40625], [1.0, 0.0, 0.0])
    """
    if kind not in KINDS:
        raise ConfigError("reference", f"unknown kind {kind!r}; expected one of {', '.join(KINDS)}")
    orders = [int(r) for r in orders]
    if kind in PATHS and len(orders) < 2:
        raise ConfigError("reference", f"{kind} draws a path with the first two outputs (x, y); this controller "
                                       f"has {len(orders)}")
    if isinstance(amplitude, (int, float)):
        amplitude = [float(amplitude)] * len(orders)
    amplitude = [float(a) for a in amplitude]
    if len(amplitude) != len(orders) or len(base) != len(orders):
        raise ConfigError("reference", f"expected {len(orders)} amplitude and base values, one per output")
    for name, value in (("at", at), ("period", period), ("duration", duration), *zip(["amplitude"] * len(amplitude), amplitude),
                        *zip(["base"] * len(base), base)):
        if not math.isfinite(value):
            raise ConfigError(f"reference {name}", f"expected a finite number, got {value}")
    for name, value in (("at", at), ("period", period), ("duration", duration)):
        if abs(value) > _LONGEST:
            raise ConfigError(f"reference {name}", f"expected at most {_LONGEST:g} s, got {value:g}")
    if period <= 0 or duration <= 0:
        raise ConfigError("reference", "period and duration must be positive")
    if period < _SHORTEST or duration < _SHORTEST:
        raise ConfigError("reference", f"period and duration must be at least {_SHORTEST:g} s "
                                       "(shorter moves have derivatives beyond any actuator)")
    return Reference(kind, orders, [float(b) for b in base], amplitude, float(at), float(period), float(duration))


def parse_reference(text: str, orders: Sequence[int], base: Sequence[float], outputs: Sequence[str]) -> Reference:
    """Read a reference from text such as ``"sine:amplitude=0.05,period=2"``.

    Amplitudes may be given per output: ``"step:tool_x=0.05,tool_y=-0.02,at=0.5"``.

    Parameters
    ----------
    text : str
        ``KIND[:key=value,...]``.
    orders : sequence of int
    base : sequence of float
    outputs : sequence of str
        Chain names, for per-output amplitudes.

    Returns
    -------
    Reference
        Built by :func:`make_reference`, which checks every setting.

    Raises
    ------
    ConfigError
        For an unknown kind or key, or a value that is not a number.

    Examples
    --------
    >>> parse_reference("step:y=2,at=1", [1], [0.0], ["y"]).sample(2.0)
    [2.0, 0.0]
    """
    kind, _, rest = text.partition(":")
    kind = kind.strip()
    if kind not in KINDS:
        raise ConfigError("--reference", f"unknown kind {kind!r}; expected one of {', '.join(KINDS)}")
    settings: dict[str, float] = {}
    per_output: dict[str, float] = {}
    for item in filter(None, (part.strip() for part in rest.split(","))):
        key, equals, value = item.partition("=")
        key = key.strip()
        if not equals:
            raise ConfigError("--reference", f"expected key=value, got {item!r}")
        try:
            number = float(value)
        except ValueError:
            raise ConfigError("--reference", f"{key}: expected a number, got {value.strip()!r}") from None
        if key in outputs:
            per_output[key] = number
        elif key in _OPTIONS[kind]:
            settings[key] = number
        else:
            allowed = ", ".join(list(_OPTIONS[kind]) + list(outputs)) or "none"
            raise ConfigError("--reference", f"unknown key {key!r} for {kind}; expected one of {allowed}")
    common = settings.pop("amplitude", 0.0)
    amplitude = [per_output.get(name, common) for name in outputs]
    return make_reference(kind, orders, base, amplitude, **settings)


def extrapolate_reference(values: Sequence[float], orders: Sequence[int], dt: float) -> list[float]:
    """A reference vector carried ``dt`` seconds forward along its own derivatives.

    Each chain's ``(y, y', ..., y^(r))`` is taken as the Taylor polynomial of degree r
    about the time it was sampled, and every entry is re-evaluated ``dt`` later:
    ``y^(k)(t + dt) = sum_{j >= k} y^(j) dt^(j-k) / (j-k)!`` (the highest derivative is
    held). A reference published slower than the control rate then moves between its
    samples instead of stepping.

    Parameters
    ----------
    values : sequence of float
        Per chain ``y_ref, y_ref', ..., y_ref^(r)``, chains in order.
    orders : sequence of int
        Relative degree r of each chain.
    dt : float
        Seconds since the sample (0 gives the values back).

    Returns
    -------
    list of float

    Examples
    --------
    >>> extrapolate_reference([1.0, 2.0, 4.0], [2], 0.5)
    [2.5, 4.0, 4.0]
    """
    out: list[float] = []
    start = 0
    for r in orders:
        chain = values[start:start + r + 1]
        for k in range(r + 1):
            term, total = 1.0, 0.0
            for j in range(k, r + 1):
                total += chain[j] * term
                term *= dt / (j - k + 1)
            out.append(total)
        start += r + 1
    return out