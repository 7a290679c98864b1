"""Density profiles over the tree, selectors of compartments, and placements.

A **profile** says how a maximal conductance density (or any membrane parameter)
varies with a variable of the compartment, by default its path distance from the
soma centre (µm), or its branch order.  Profiles are small frozen dataclasses
called as ``profile(x) -> values``; after evaluation the result is clipped to
``[floor, ceiling]`` where those are given.  :data:`PROFILES` maps the kind names
used in scenario files to the classes, and :func:`make_profile` builds one by name.

A **selector** picks compartments by SWC type, path-distance range and
branch-order range (all given conditions must hold).  Ranges are half-open,
``lo <= x < hi``: inclusive lower bound, exclusive upper bound, so adjacent ranges
``(0, 100)`` and ``(100, inf)`` split the tree without overlap or gap.

A **placement** puts a channel (:class:`ChannelPlacement`) or a passive membrane
parameter (:class:`MembranePlacement`) on the compartments a selector picks, with
a profile for its value.

Overlap rule
------------
- Overlapping placements of the *same channel* add their densities (gmax); on
  the shared compartments their parameters and reversal potentials must agree,
  otherwise the cell model is refused with a :class:`~cabletree.errors.ProfileError`.
- Overlapping :class:`MembranePlacement` of the *same parameter* are refused
  with a ProfileError naming both placements and the first shared compartment
  (a membrane value has no natural way to combine).

The arrays are assembled in :mod:`cabletree.cell` with :func:`evaluate` and
:meth:`Selector.mask`.
"""

from __future__ import annotations

import difflib
import math
from dataclasses import KW_ONLY, MISSING, dataclass, fields
from typing import TYPE_CHECKING, Any, Mapping

import numpy as np

from .errors import ProfileError

if TYPE_CHECKING:  # pragma: no cover - typing only
    from .channels.base import Channel
    from .grid import Grid

__all__ = [
    "Profile", "Uniform", "Linear", "Exponential", "Sigmoid", "Step", "Table",
    "PROFILES", "PROFILE_VARIABLES", "make_profile", "as_profile", "evaluate",
    "Selector", "ChannelPlacement", "MembranePlacement", "MEMBRANE_PARAMETERS",
    "SpineCorrection",
]

#: Compartment variables a profile can be a function of (names of Grid arrays).
PROFILE_VARIABLES = ("path_distance_um", "branch_order")

#: Passive parameters a :class:`MembranePlacement` can set.
MEMBRANE_PARAMETERS = ("cm_uF_per_cm2", "leak_S_per_cm2", "leak_reversal_mV",
                       "axial_resistivity_ohm_cm", "spine_factor")


def _suggest(name: str, known) -> str:
    known = list(known)
    close = difflib.get_close_matches(name, known, n=1, cutoff=0.5)
    if not close:
        close = [k for k in known if name and k.startswith(name)][:1]
    return f"; did you mean {close[0]!r}?" if close else ""


def _is_number(x) -> bool:
    return isinstance(x, (int, float, np.integer, np.floating)) and not isinstance(x, (bool, np.bool_))


def _check_finite(owner: str, field_name: str, value, allow_inf: bool = False) -> float:
    if not _is_number(value) or math.isnan(float(value)) or (
            not allow_inf and math.isinf(float(value))):
        kind = "a number" if allow_inf else "a finite number"
        raise ProfileError(f"{owner}: field {field_name!r} must be {kind}, got {value!r}")
    return float(value)


@dataclass(frozen=True)
class Profile:
    """Base of all profiles: a function of one compartment variable, then clipped.

    Parameters
    ----------
    floor : float or None
        Lower bound applied after evaluation (same units as the values).
    ceiling : float or None
        Upper bound applied after evaluation.
    variable : str
        The compartment variable x: ``"path_distance_um"`` (µm, default) or
        ``"branch_order"``.
    """

    _: KW_ONLY
    floor: float | None = None
    ceiling: float | None = None
    variable: str = "path_distance_um"

    def __post_init__(self) -> None:
        owner = type(self).__name__
        for name in ("floor", "ceiling"):
            v = getattr(self, name)
            if v is not None:
                object.__setattr__(self, name, _check_finite(owner, name, v))
        if self.floor is not None and self.ceiling is not None and self.floor > self.ceiling:
            raise ProfileError(
                f"{owner}: field 'floor' ({self.floor}) must not exceed 'ceiling' ({self.ceiling})")
        if self.variable not in PROFILE_VARIABLES:
            raise ProfileError(
                f"{owner}: field 'variable' must be one of {list(PROFILE_VARIABLES)}, got "
                f"{self.variable!r}{_suggest(str(self.variable), PROFILE_VARIABLES)}")
        self._validate()

    def _validate(self) -> None:
        """Check the subclass fields (raise ProfileError naming the field)."""

    def _values(self, x: np.ndarray) -> np.ndarray:
        raise NotImplementedError

    def __call__(self, x) -> np.ndarray:
        """Values of the profile at ``x`` (units of the profile's values).

        Parameters
        ----------
        x : float or ndarray
            Values of :attr:`variable` (µm of path distance, or branch order).

        Returns
        -------
        ndarray
            Same shape as ``x``, clipped to ``[floor, ceiling]``.
        """
        x = np.asarray(x, dtype=float)
        y = np.broadcast_to(np.asarray(self._values(x), dtype=float), x.shape)
        if self.floor is not None or self.ceiling is not None:
            y = np.clip(y, self.floor, self.ceiling)
        return np.array(y, dtype=float)


@dataclass(frozen=True)
class Uniform(Profile):
    """The same value everywhere."""

    value: float

    def _validate(self) -> None:
        object.__setattr__(self, "value", _check_finite("Uniform", "value", self.value))

    def _values(self, x):
        return np.full(x.shape, self.value)


@dataclass(frozen=True)
class Linear(Profile):
    """``value_at_zero + slope_per_um · x``.

    Parameters
    ----------
    value_at_zero : float
        Value at x = 0 (the soma for path distance).
    slope_per_um : float
        Change per unit of x (per µm of path distance, or per branch order).
    """

    value_at_zero: float
    slope_per_um: float

    def _validate(self) -> None:
        for name in ("value_at_zero", "slope_per_um"):
            object.__setattr__(self, name, _check_finite("Linear", name, getattr(self, name)))

    def _values(self, x):
        return self.value_at_zero + self.slope_per_um * x


@dataclass(frozen=True)
class Exponential(Profile):
    """``baseline + value_at_zero · exp(x / length_constant_um)``.

    A negative ``length_constant_um`` gives a decay with distance.

    Parameters
    ----------
    value_at_zero : float
        Amplitude of the exponential term at x = 0.
    length_constant_um : float
        e-fold distance, µm (non-zero; negative for a decay).
    baseline : float
        Constant added to the exponential term.
    """

    value_at_zero: float
    length_constant_um: float
    baseline: float = 0.0

    def _validate(self) -> None:
        for name in ("value_at_zero", "length_constant_um", "baseline"):
            object.__setattr__(self, name, _check_finite("Exponential", name, getattr(self, name)))
        if self.length_constant_um == 0.0:
            raise ProfileError("Exponential: field 'length_constant_um' must be non-zero, got 0.0")

    def _values(self, x):
        return self.baseline + self.value_at_zero * np.exp(x / self.length_constant_um)


@dataclass(frozen=True)
class Sigmoid(Profile):
    """``low + (high - low) / (1 + exp(-(x - midpoint_um) / width_um))``.

    Parameters
    ----------
    low, high : float
        Values far below and far above the midpoint.
    midpoint_um : float
        x at which the value is halfway, µm.
    width_um : float
        Slope factor, µm (> 0; swap ``low`` and ``high`` for a decrease).
    """

    low: float
    high: float
    midpoint_um: float
    width_um: float

    def _validate(self) -> None:
        for name in ("low", "high", "midpoint_um", "width_um"):
            object.__setattr__(self, name, _check_finite("Sigmoid", name, getattr(self, name)))
        if not self.width_um > 0:
            raise ProfileError(f"Sigmoid: field 'width_um' must be > 0, got {self.width_um!r}")

    def _values(self, x):
        return self.low + (self.high - self.low) / (
            1.0 + np.exp(-(x - self.midpoint_um) / self.width_um))


@dataclass(frozen=True)
class Step(Profile):
    """``below`` where ``x < threshold_um``, ``above`` elsewhere.

    Parameters
    ----------
    below, above : float
        Values on either side of the threshold.
    threshold_um : float
        Threshold, µm (a point exactly at it gets ``above``).
    """

    below: float
    above: float
    threshold_um: float

    def _validate(self) -> None:
        for name in ("below", "above", "threshold_um"):
            object.__setattr__(self, name, _check_finite("Step", name, getattr(self, name)))

    def _values(self, x):
        return np.where(x < self.threshold_um, self.below, self.above)


@dataclass(frozen=True)
class Table(Profile):
    """Linear interpolation in a table of (x, value); constant beyond its ends.

    Parameters
    ----------
    x : tuple of float
        Strictly increasing abscissae (µm of path distance, or branch order).
    values : tuple of float
        Values at ``x`` (same length, at least one point).
    """

    x: tuple = ()
    values: tuple = ()

    def _validate(self) -> None:
        for name in ("x", "values"):
            seq = getattr(self, name)
            if isinstance(seq, (str, bytes)) or not hasattr(seq, "__len__"):
                raise ProfileError(f"Table: field {name!r} must be a sequence of numbers, got {seq!r}")
            object.__setattr__(self, name, tuple(
                _check_finite("Table", f"{name}[{i}]", v) for i, v in enumerate(seq)))
        if len(self.x) == 0:
            raise ProfileError("Table: field 'x' must hold at least one point")
        if len(self.x) != len(self.values):
            raise ProfileError(
                f"Table: fields 'x' and 'values' must have the same length, got {len(self.x)} "
                f"and {len(self.values)}")
        d = np.diff(self.x)
        if np.any(d <= 0):
            i = int(np.nonzero(d <= 0)[0][0])
            raise ProfileError(
                f"Table: field 'x' must be strictly increasing, but x[{i + 1}] = {self.x[i + 1]} "
                f"follows x[{i}] = {self.x[i]}")

    def _values(self, x):
        return np.interp(x, np.asarray(self.x), np.asarray(self.values))


#: Profile kinds by the names used in scenario files.
PROFILES: dict[str, type] = {
    "uniform": Uniform,
    "linear": Linear,
    "exponential": Exponential,
    "sigmoid": Sigmoid,
    "step": Step,
    "table": Table,
}


def make_profile(kind: str, **params: Any) -> Profile:
    """Build a profile by kind name.

    Parameters
    ----------
    kind : str
        One of the keys of :data:`PROFILES`.
    **params
        The fields of that profile class (plus ``floor``, ``ceiling``, ``variable``).

    Returns
    -------
    Profile

    Raises
    ------
    ProfileError
        Unknown kind, unknown or missing parameter, or an invalid value.
    """
    if kind not in PROFILES:
        raise ProfileError(f"unknown profile kind {kind!r}{_suggest(str(kind), PROFILES)} "
                           f"(known: {sorted(PROFILES)})")
    cls = PROFILES[kind]
    allowed = [f.name for f in fields(cls)]
    unknown = [k for k in params if k not in allowed]
    if unknown:
        raise ProfileError(f"profile {kind!r}: unknown parameter {unknown[0]!r}"
                           f"{_suggest(unknown[0], allowed)} (expected: {allowed})")
    missing = [f.name for f in fields(cls) if f.default is MISSING
               and f.default_factory is MISSING and f.name not in params]
    if missing:
        raise ProfileError(f"profile {kind!r}: missing parameter {missing[0]!r} "
                           f"(expected: {allowed})")
    return cls(**params)


def as_profile(value) -> Profile:
    """A profile from a number (becomes :class:`Uniform`) or a profile (returned as is).

    Raises
    ------
    ProfileError
        ``value`` is neither.
    """
    if isinstance(value, Profile):
        return value
    if _is_number(value):
        return Uniform(float(value))
    raise ProfileError(f"expected a number or a profile, got {value!r}")


def evaluate(profile, grid: "Grid", index=None) -> np.ndarray:
    """Values of a profile (or number) at compartments of a grid.

    Parameters
    ----------
    profile : Profile or float
        The profile; a number means a uniform value.
    grid : Grid
        The compartments; ``grid.path_distance_um`` or ``grid.branch_order`` is
        used according to ``profile.variable``.
    index : ndarray of int or bool, optional
        Compartments to evaluate (default: all).

    Returns
    -------
    ndarray of float
        One value per selected compartment (units of the profile).
    """
    p = as_profile(profile)
    x = np.asarray(getattr(grid, p.variable), dtype=float)
    if index is not None:
        x = x[index]
    return p(x)


def _range(owner: str, name: str, value, integer: bool):
    if value is None:
        return None
    if isinstance(value, (str, bytes)) or not hasattr(value, "__len__") or len(value) != 2:
        raise ProfileError(f"{owner}: field {name!r} must be a pair (lo, hi), got {value!r}")
    lo = _check_finite(owner, f"{name}[0]", value[0], allow_inf=True)
    hi = _check_finite(owner, f"{name}[1]", value[1], allow_inf=True)
    if integer:
        for v in (lo, hi):
            if not math.isinf(v) and v != int(v):
                raise ProfileError(f"{owner}: field {name!r} must hold integers, got {value!r}")
    if not lo < hi:
        raise ProfileError(f"{owner}: field {name!r} must have lo < hi (range [lo, hi)), "
                           f"got {value!r}")
    return (lo, hi)


@dataclass(frozen=True)
class Selector:
    """Which compartments a placement applies to.

    All given conditions must hold (logical AND); a condition left as None is not
    applied, so ``Selector()`` selects every compartment.  Ranges are half-open:
    ``lo <= x < hi`` (use ``math.inf`` for no upper bound).

    Parameters
    ----------
    swc_types : tuple of int or None
        SWC types to include (1 soma, 2 axon, 3 basal, 4 apical, 5+ custom).
    path_distance_um : (float, float) or None
        Path-distance range ``[lo, hi)`` from the soma centre, µm.
    branch_order : (int, int) or None
        Branch-order range ``[lo, hi)`` (the soma has order 0, stems 1).
    """

    swc_types: tuple[int, ...] | None = None
    path_distance_um: tuple[float, float] | None = None
    branch_order: tuple[int, int] | None = None

    def __post_init__(self) -> None:
        if self.swc_types is not None:
            types = (self.swc_types,) if _is_number(self.swc_types) else self.swc_types
            if isinstance(types, (str, bytes)) or not hasattr(types, "__iter__"):
                raise ProfileError(
                    f"Selector: field 'swc_types' must be a tuple of integers, got {self.swc_types!r}")
            out = []
            for t in types:
                if not _is_number(t) or t != int(t) or t < 0:
                    raise ProfileError(f"Selector: field 'swc_types' must hold non-negative "
                                       f"integers, got {self.swc_types!r}")
                out.append(int(t))
            if not out:
                raise ProfileError("Selector: field 'swc_types' is empty; use None for all types")
            object.__setattr__(self, "swc_types", tuple(out))
        object.__setattr__(self, "path_distance_um",
                           _range("Selector", "path_distance_um", self.path_distance_um, False))
        object.__setattr__(self, "branch_order",
                           _range("Selector", "branch_order", self.branch_order, True))

    def mask(self, grid: "Grid") -> np.ndarray:
        """Boolean mask of the selected compartments.

        Parameters
        ----------
        grid : Grid

        Returns
        -------
        ndarray of bool, shape (n_compartments,)
        """
        m = np.ones(grid.n_compartments, dtype=bool)
        if self.swc_types is not None:
            m &= np.isin(grid.swc_type, self.swc_types)
        if self.path_distance_um is not None:
            lo, hi = self.path_distance_um
            m &= (grid.path_distance_um >= lo) & (grid.path_distance_um < hi)
        if self.branch_order is not None:
            lo, hi = self.branch_order
            m &= (grid.branch_order >= lo) & (grid.branch_order < hi)
        return m


def _profile_field(owner: str, name: str, value) -> Profile:
    try:
        return as_profile(value)
    except ProfileError:
        raise ProfileError(f"{owner}: field {name!r} must be a number or a profile, "
                           f"got {value!r}") from None


@dataclass(frozen=True)
class ChannelPlacement:
    """A channel placed on selected compartments with a density profile.

    Parameters
    ----------
    channel : Channel
        The kinetic model (:mod:`cabletree.channels`).
    gmax_S_per_cm2 : Profile or float
        Maximal conductance density, S/cm² (a number is uniform).  It must
        evaluate to >= 0; :mod:`cabletree.cell` refuses negative values naming the
        compartment.
    where : Selector
        Compartments that get the channel (default: all).
    parameters : mapping of str to Profile or float
        Values of the channel's named parameters (:attr:`Channel.parameter_names`);
        those not given keep their defaults.  Stored as a tuple of
        ``(name, Profile)`` pairs, in the order given.
    reversal_mV : Profile or float or None
        Reversal potential, mV; None uses the channel's default.

    Notes
    -----
    Overlapping placements of the same channel add their gmax; their parameters and
    reversal potentials must agree on the shared compartments (module docstring).
    """

    channel: "Channel"
    gmax_S_per_cm2: Profile | float
    where: Selector = Selector()
    parameters: Any = ()
    reversal_mV: Profile | float | None = None

    def __post_init__(self) -> None:
        name = getattr(self.channel, "name", None)
        known = getattr(self.channel, "parameter_names", None)
        if name is None or known is None:
            raise ProfileError(
                f"ChannelPlacement: field 'channel' must be a Channel, got {self.channel!r}")
        owner = f"ChannelPlacement of {name!r}"
        object.__setattr__(self, "gmax_S_per_cm2",
                           _profile_field(owner, "gmax_S_per_cm2", self.gmax_S_per_cm2))
        if not isinstance(self.where, Selector):
            raise ProfileError(f"{owner}: field 'where' must be a Selector, got {self.where!r}")
        items = (tuple(self.parameters.items()) if isinstance(self.parameters, Mapping)
                 else tuple(self.parameters))
        pairs = []
        for item in items:
            if isinstance(item, (str, bytes)) or not hasattr(item, "__len__") or len(item) != 2:
                raise ProfileError(f"{owner}: field 'parameters' must be a mapping or (name, "
                                   f"value) pairs, got {self.parameters!r}")
            pname, value = item
            if pname not in known:
                raise ProfileError(
                    f"{owner}: unknown parameter {pname!r}{_suggest(str(pname), known)} "
                    f"(the channel has: {list(known)})")
            if pname in (n for n, _ in pairs):
                raise ProfileError(f"{owner}: parameter {pname!r} given twice")
            pairs.append((pname, _profile_field(owner, f"parameters[{pname!r}]", value)))
        object.__setattr__(self, "parameters", tuple(pairs))
        if self.reversal_mV is not None:
            object.__setattr__(self, "reversal_mV",
                               _profile_field(owner, "reversal_mV", self.reversal_mV))


@dataclass(frozen=True)
class MembranePlacement:
    """A passive membrane parameter set on selected compartments by a profile.

    Parameters
    ----------
    parameter : str
        One of :data:`MEMBRANE_PARAMETERS`: ``"cm_uF_per_cm2"`` (µF/cm²),
        ``"leak_S_per_cm2"`` (S/cm²), ``"leak_reversal_mV"`` (mV),
        ``"axial_resistivity_ohm_cm"`` (Ω·cm) or ``"spine_factor"``
        (dimensionless, see :func:`SpineCorrection`).
    value : Profile or float
        The value (a number is uniform).
    where : Selector
        Compartments it applies to (default: all).

    Notes
    -----
    Overlapping placements of the same parameter are refused (module docstring).
    """

    parameter: str
    value: Profile | float
    where: Selector = Selector()

    def __post_init__(self) -> None:
        if self.parameter not in MEMBRANE_PARAMETERS:
            raise ProfileError(
                f"MembranePlacement: unknown parameter {self.parameter!r}"
                f"{_suggest(str(self.parameter), MEMBRANE_PARAMETERS)} "
                f"(expected one of {list(MEMBRANE_PARAMETERS)})")
        object.__setattr__(self, "value", _profile_field(
            f"MembranePlacement of {self.parameter!r}", "value", self.value))
        if not isinstance(self.where, Selector):
            raise ProfileError(f"MembranePlacement of {self.parameter!r}: field 'where' must be "
                               f"a Selector, got {self.where!r}")


def SpineCorrection(factor: Profile | float, where: Selector = Selector()) -> MembranePlacement:
    """Area correction for dendritic spines: ``MembranePlacement("spine_factor", factor, where)``.

    The factor ``F = (shaft area + spine area) / shaft area`` multiplies the
    specific capacitance and all membrane conductance densities (leak and channels)
    of the selected compartments, i.e. Rm becomes Rm/F.  This is common practice
    (e.g. Holmes WR 1989, Brain Res 478:127-137; Rapp M, Yarom Y, Segev I 1992,
    Neural Comput 4:518-533); typical F is 1.5-2.5 for pyramidal dendrites.  Leave
    the soma, axon and spine-poor proximal dendrite uncorrected (select around them).

    Parameters
    ----------
    factor : Profile or float
        F (dimensionless, >= 1 physically; must be > 0).
    where : Selector
        Spiny compartments.

    Returns
    -------
    MembranePlacement
    """
    return MembranePlacement("spine_factor", factor, where)
