"""The plant a dynamically extended design is synthesised on.

When the analysis found a dynamic extension (:mod:`linz_ros.analysis._extension`), the law is
the static law of the extended plant: states ``(x, xi)``, new inputs ``w``. The plant's own
inputs are the compensator's first states, ``u_j = xi_j1`` (or ``w_j`` for an input without
integrators), which the runtime integrates at its rate (``linz_ros.runtime.extension``).

The extended plant keeps the plant file's name, source and design section; its operating point
puts each compensator state at the start value the search chose; signal units carry over, the
first compensator state in its input's unit and each further one per second more.
"""

from __future__ import annotations

from dataclasses import replace

from linz_ros.analysis import DynamicExtension, Report, extended_plant
from linz_ros.model import Plant

__all__ = ["extended_design_plant", "extended_report", "delayed_counts"]


def delayed_counts(plant: Plant, extension: DynamicExtension) -> tuple[int, ...]:
    """Integrators per input of ``plant``, in its order.

    Parameters
    ----------
    plant : Plant
    extension : DynamicExtension

    Returns
    -------
    tuple of int
    """
    return tuple(int(extension.integrators.get(u, 0)) for u in plant.input_names)


def _per_second(unit: str, times: int) -> str:
    if times == 0:
        return unit
    base = unit if "/" not in unit and " " not in unit else f"({unit})"
    return f"{base}/s" if times == 1 else f"{base}/s^{times}"


def _extended_units(plant: Plant, extended: Plant, counts: tuple[int, ...]) -> dict[str, str]:
    units = dict(plant.signal_units)
    added = iter(extended.state_names[plant.n:])
    for u, k, w in zip(plant.input_names, counts, extended.input_names):
        unit = plant.signal_units.get(u)
        names = [next(added) for _ in range(k)]
        if unit is None or k == 0:
            continue
        units.update({name: _per_second(unit, i) for i, name in enumerate(names)})
        units[w] = _per_second(unit, k)
    return units


def extended_design_plant(plant: Plant, extension: DynamicExtension) -> Plant:
    """The extended plant with the plant file's design section, start values and units.

    Parameters
    ----------
    plant : Plant
        The plant as loaded.
    extension : DynamicExtension
        A found extension (``extension.found`` True).

    Returns
    -------
    Plant
    """
    counts = delayed_counts(plant, extension)
    extended = extended_plant(plant, counts)
    point = {**extended.operating_point, **{k: float(v) for k, v in extension.start.items()}}
    return replace(extended, operating_point=point, design=dict(plant.design),
                   signal_units=_extended_units(plant, extended, counts))


def extended_report(plant: Plant, extended: Plant, report: Report, extension: DynamicExtension) -> Report:
    """The report a design on the extended plant reads: the extension's input-output result and
    the extended decoupling matrix's conditioning over the extended envelope (from the analysis).

    Parameters
    ----------
    plant, extended : Plant
    report : Report
        The plant's own analysis (its input-state result is kept: it speaks of the plant).
    extension : DynamicExtension

    Returns
    -------
    Report
    """
    return Report(extended, report.input_state, extension.result, extension.envelope)
