"""Shared test support: paths of the bundled and reference plants, the minimal plant, built artifacts."""

from __future__ import annotations

import contextlib
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
BUNDLED = ROOT / "config" / "plants"
REFERENCE = Path(__file__).resolve().parent / "plants"


MINIMAL = """\
plant: demo
states: [x1, x2]
inputs: [u]
parameters: {k: 2.0}
dynamics:
  x1: x2
  x2: -k*sin(x1) + u
"""


_BUILT: dict = {}


def built_artifact(source, options=None, points: int = 8):
    """An artifact built in memory from a plant file path or plant-file text (cached per session)."""
    from linz_ros.artifact import artifact_from_text, seal
    from linz_ros.codegen import build_document
    from linz_ros.model import load_plant, plant_from_text
    from linz_ros.synthesis import synthesise

    key = (str(source), repr(options))
    if key not in _BUILT:
        plant = load_plant(source) if isinstance(source, Path) else plant_from_text(source, "<test>")
        design = synthesise(plant, options)
        _BUILT[key] = seal(build_document(design, points=points)[0])
    return artifact_from_text(_BUILT[key])


def built_artifact_file(source: Path, folder: Path) -> Path:
    """The artifact of :func:`built_artifact` (default options, cached per session) as a file in ``folder``."""
    built_artifact(source)
    path = folder / f"{source.stem}.artifact.json"
    path.write_text(_BUILT[(str(source), repr(None))])
    return path


def sampled_chain_error(gains, period: float, e0: float, steps: int):
    """Designed error of one Brunovsky chain under the sampled law (zero-order hold):
    e[k+1] = (Phi - Gamma K) e[k] from e = (e0, 0, ...); the first component at every step."""
    import numpy as np
    import scipy.linalg

    from linz_ros.synthesis import chain_matrices

    order = len(gains)
    A, B = chain_matrices(order)
    augmented = np.zeros((order + 1, order + 1))
    augmented[:order, :order], augmented[:order, order:] = A * period, B * period
    E = scipy.linalg.expm(augmented)
    closed = E[:order, :order] - E[:order, order:] @ np.atleast_2d(np.asarray(gains, dtype=float))
    e = np.zeros(order)
    e[0] = e0
    out = []
    for _ in range(steps):
        out.append(e[0])
        e = closed @ e
    return np.array(out)


def pendulum_chain_text(n: int, envelope: bool = True, rate: float | None = None) -> str:
    """Plant-file text of n pendulums joined by springs, torque on the first, output the last
    (relative degree 2n); with ``rate`` a design section placing every pole at -4."""
    states = ", ".join(f"th{i}, om{i}" for i in range(1, n + 1))
    lines = [f"plant: chain{n}", f"states: [{states}]", "inputs: [u]", "parameters: {a: 9.0, k: 4.0}",
             "dynamics:"]
    for i in range(1, n + 1):
        springs = "".join(f" + k*(th{j} - th{i})" for j in (i - 1, i + 1) if 1 <= j <= n)
        lines += [f"  th{i}: om{i}", f"  om{i}: -a*sin(th{i}){springs}{' + u' if i == 1 else ''}"]
    lines.append(f"outputs: {{y: th{n}}}")
    if rate is not None:
        lines.append(f"design: {{rate: {rate}, poles: {{y: [{', '.join(['-4'] * (2 * n))}]}}}}")
    if envelope:
        lines.append("envelope: {" + ", ".join(f"th{i}: [-1, 1]" for i in range(1, n + 1)) + "}")
    return "\n".join(lines) + "\n"


def c_words_not_ours(source: str) -> set:
    """Identifiers in emitted C that are neither C's own words, our slot names, nor whitelisted functions."""
    import re

    allowed = re.compile(r"(a\d+_\d+|t\d+|h\d+|v\d+|v|out|const|double|void|static|inline|return|if|include|math|h|"
                         r"linz_sign|linz_law|linz_law_jets|linz_dynamics|linz_next_order|between|next|int|order|"
                         r"outputs|inputs|out[012]|a\d+_\d+_[12]|j\d+|isgreater|isless|sin|cos|tan|asin|acos|atan|atan2|sinh|"
                         r"cosh|tanh|exp|log|sqrt|fabs|pow|e)")
    without_numbers = re.sub(r"\b\d+(\.\d*)?(e[-+]?\d+)?\b", " ", source)
    return {word for word in re.findall(r"[A-Za-z_][A-Za-z0-9_]*", without_numbers) if not allowed.fullmatch(word)}


@contextlib.contextmanager
def node_factory(node_class, params_file: Path, artifact: Path, **fixed):
    """Make ROS nodes of ``node_class`` from a bringup parameter file and an artifact, each in a context of its
    own (``fixed`` parameters first, then each call's), and destroy them all on leaving."""
    import rclpy

    made = []

    def make(**parameters):
        context = rclpy.Context()
        args = ["--ros-args", "--params-file", str(params_file), "-p", f"artifact:={artifact}"]
        for key, value in {**fixed, **parameters}.items():
            args += ["-p", f"{key}:={value}"]
        rclpy.init(args=args, context=context)
        node = node_class(context=context)
        made.append((node, context))
        return node

    try:
        yield make
    finally:
        for node, context in made:
            node.destroy_node()
            context.try_shutdown()


# ---------------------------------------------------------------- tasks for the executor's tests (module level:
# spawned workers and Dask workers import them by name)

def executor_prepare(text: str) -> str:
    """The prepared context of the executor's test tasks: the shipped text, upper case."""
    return text.upper()


def executor_task(prepared: str, item: object) -> tuple:
    """Echo the item with the context; -1 raises a user error, -2 kills the worker, ('wait', path) waits
    until the file at path exists (so a test can kill the worker while it holds the task)."""
    import os
    import time

    from linz_ros.errors import ConfigError

    if item == -1:
        raise ConfigError("item", "refused for its input")
    if item == -2:
        os._exit(7)
    if isinstance(item, tuple) and item[0] == "wait":
        with open(item[1] + f".{os.getpid()}.pid", "w"):      # who holds the task (a test kills it)
            pass
        deadline = time.monotonic() + 60
        while not os.path.exists(item[1]) and time.monotonic() < deadline:
            time.sleep(0.01)
        return prepared, item[1], os.getpid()
    if item == "boom":
        return prepared, item + 1          # a fault of the task itself (TypeError), not of its input
    return prepared, item
