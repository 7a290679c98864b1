"""Threshold search: the smallest input strength at which a criterion is met, by bisection.

Typical use: the synaptic weight at which a cluster of distal synapses first evokes a
local dendritic spike (:func:`cabletree.analysis.detect_dendritic_spike`).  The
criterion must be monotone in the searched value on ``[low, high]`` (false at
``low``, true at ``high``); bisection (e.g. Press et al, Numerical Recipes, 3rd ed.
2007, §9.1) then halves the bracket until it is narrower than ``tolerance``.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Callable, Sequence

from .errors import ScenarioError

__all__ = ["ThresholdResult", "find_threshold", "scenario_threshold"]


@dataclass(frozen=True)
class ThresholdResult:
    """Outcome of :func:`find_threshold`.

    Attributes
    ----------
    threshold : float
        Upper end of the final bracket: the smallest tested value meeting the criterion.
    low, high : float
        Final bracket (criterion false at ``low``, true at ``high``).
    n_runs : int
        Number of evaluations of the criterion.
    history : tuple of (float, bool)
        Every tested value and its outcome, in order.
    """

    threshold: float
    low: float
    high: float
    n_runs: int
    history: tuple


def find_threshold(criterion: Callable[[float], bool], low: float, high: float,
                   tolerance: float, max_runs: int = 20) -> ThresholdResult:
    """Bisect for the value at which ``criterion`` switches from false to true.

    Parameters
    ----------
    criterion : callable float -> bool
        Runs the experiment at a value and says whether the effect occurred.
    low, high : float
        Initial bracket (same units as the searched value, e.g. nS).
    tolerance : float
        Stop when ``high - low <= tolerance``.
    max_runs : int
        Largest number of criterion evaluations (the two end checks included).

    Returns
    -------
    ThresholdResult

    Raises
    ------
    ScenarioError
        The criterion holds at ``low`` or fails at ``high`` (no bracket), or the
        bracket is still wider than ``tolerance`` after ``max_runs`` evaluations.
    """
    if not low < high or not tolerance > 0:
        raise ScenarioError(f"threshold search needs low < high and tolerance > 0, got "
                            f"{low!r}, {high!r}, {tolerance!r}")
    history = []

    def test(x: float) -> bool:
        ok = bool(criterion(x))
        history.append((float(x), ok))
        return ok

    if test(low):
        raise ScenarioError(f"threshold search: the criterion already holds at low = {low:g}; "
                            "lower it")
    if not test(high):
        raise ScenarioError(f"threshold search: the criterion does not hold at high = {high:g}; "
                            "raise it")
    while high - low > tolerance:
        if len(history) >= max_runs:
            raise ScenarioError(f"threshold search: bracket [{low:g}, {high:g}] still wider "
                                f"than {tolerance:g} after {max_runs} runs")
        mid = 0.5 * (low + high)
        if test(mid):
            high = mid
        else:
            low = mid
    return ThresholdResult(high, low, high, len(history), tuple(history))


def scenario_threshold(scenario, keys: Sequence[str], low: float, high: float, tolerance: float,
                       criterion_spec: dict, factors: Sequence[float] | None = None,
                       max_runs: int = 20, backend: str = "auto",
                       progress: Callable[[str], None] | None = None):
    """Threshold of a scenario input for a local dendritic spike.

    Each tested value ``x`` sets every key path in ``keys`` to ``x * factor`` (e.g.
    the AMPA and NMDA weights of one synapse cluster together) with
    :func:`cabletree.scenario.with_overrides`, runs the scenario and applies
    :func:`cabletree.analysis.detect_dendritic_spike` with the settings of
    ``criterion_spec`` (``site``, ``soma_site``, ``threshold_mV``, ``window_ms``).

    Parameters
    ----------
    scenario : Scenario
    keys : sequence of str
        Dotted key paths, e.g. ``["inputs.cluster_ampa.weight_nS"]``.
    low, high, tolerance : float
        Bracket and tolerance of the searched value (units of the keys, e.g. nS).
    criterion_spec : dict
        The ``[analysis.dendritic_spike]`` table.
    factors : sequence of float, optional
        Multiplier per key (default all 1).
    max_runs : int
    backend : str
    progress : callable str -> None, optional
        Receives one line per run.

    Returns
    -------
    (ThresholdResult, xarray.Dataset)
        The result and the run at the threshold.
    """
    from .report import dendritic_spike
    from .scenario import run_scenario, with_overrides

    factors = [1.0] * len(keys) if factors is None else list(factors)
    runs = {}

    def run_at(x: float):
        s = with_overrides(scenario, {k: float(x * f) for k, f in zip(keys, factors)})
        ds = run_scenario(s, backend=backend)
        runs[x] = ds
        return ds

    def criterion(x: float) -> bool:
        ok = dendritic_spike(run_at(x), criterion_spec).occurred
        if progress is not None:
            progress(f"threshold search: {x:.4g} -> {'spike' if ok else 'no spike'}")
        return ok

    result = find_threshold(criterion, low, high, tolerance, max_runs)
    return result, runs[result.threshold]
