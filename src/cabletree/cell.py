"""Assembling one cell model: every array the solver needs, and nothing else.

A :class:`CellModel` is built from a grid (or a morphology and a spacing rule),
passive membrane settings per SWC type, channel placements with density
profiles, inputs and recording sites.  It holds absolute quantities per
compartment (capacitance in nF, conductances in µS) so the solver multiplies
nothing by areas.  Placement rules: overlapping placements of one channel add
their densities; overlapping membrane placements of one parameter are refused
(see :mod:`cabletree.profiles`).
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Mapping, Sequence

import numpy as np

from .channels.base import Channel
from .errors import CellModelError, ProfileError
from .grid import Grid, SpacingRule, build_grid
from .inputs import SynapseKinetics
from .morphology.samples import Morphology
from .sites import Site, soma_site
from . import units

__all__ = ["Membrane", "ChannelBlock", "CurrentInjection", "SynapseGroup", "CellModel", "build_cell"]

_MEMBRANE_PARAMETERS = ("cm_uF_per_cm2", "leak_S_per_cm2", "leak_reversal_mV",
                        "axial_resistivity_ohm_cm", "spine_factor")


@dataclass(frozen=True)
class Membrane:
    """Passive membrane properties, each a number or a mapping SWC type -> number.

    A mapping may hold a ``"default"`` entry for types not listed.

    Parameters
    ----------
    cm_uF_per_cm2 : float or mapping
        Specific membrane capacitance, µF/cm².
    axial_resistivity_ohm_cm : float or mapping
        Cytoplasmic resistivity Ri, Ω·cm.
    leak_S_per_cm2 : float or mapping
        Leak conductance density, S/cm² (1/Rm with Rm in Ω·cm²).
    leak_reversal_mV : float or mapping
        Leak reversal potential, mV.
    """

    cm_uF_per_cm2: float | Mapping = 1.0
    axial_resistivity_ohm_cm: float | Mapping = 150.0
    leak_S_per_cm2: float | Mapping = 5e-5
    leak_reversal_mV: float | Mapping = -65.0

    def per_compartment(self, name: str, swc_type: np.ndarray) -> np.ndarray:
        """Values of parameter ``name`` for each compartment's SWC type."""
        value = getattr(self, name)
        if not isinstance(value, Mapping):
            return np.full(len(swc_type), float(value))
        out = np.empty(len(swc_type))
        for t in np.unique(swc_type):
            if int(t) in value:
                v = value[int(t)]
            elif "default" in value:
                v = value["default"]
            else:
                raise CellModelError(
                    f"membrane {name}: no value for SWC type {int(t)} and no 'default' entry")
            out[swc_type == t] = float(v)
        return out


@dataclass(frozen=True, eq=False)
class ChannelBlock:
    """One channel placed on a set of compartments (structure of arrays).

    Attributes
    ----------
    channel : Channel
    index : ndarray of int64, shape (k,)
        Compartments carrying the channel, increasing.
    gmax_S_per_cm2 : ndarray, shape (k,)
        Maximal conductance density (before the spine factor), S/cm².
    gmax_uS : ndarray, shape (k,)
        Maximal conductance of each compartment (area and spine factor applied), µS.
    reversal_mV : ndarray, shape (k,)
        Reversal potential, mV.
    parameters : ndarray, shape (n_parameters, k)
        Values of the channel's named parameters, in ``channel.parameter_names`` order.
    """

    channel: Channel
    index: np.ndarray
    gmax_S_per_cm2: np.ndarray
    gmax_uS: np.ndarray
    reversal_mV: np.ndarray
    parameters: np.ndarray

    def parameter_tuple(self):
        """The ``p`` argument of the rate functions (fields are (k,) arrays)."""
        return self.channel.parameter_tuple(*self.parameters)


@dataclass(frozen=True)
class CurrentInjection:
    """A current waveform injected at a site.

    Parameters
    ----------
    site : Site
    waveform : object
        Anything with ``current_nA(t_ms)`` and ``breakpoints_ms()`` (see
        :mod:`cabletree.inputs`).
    """

    site: Site
    waveform: object


@dataclass(frozen=True, eq=False)
class SynapseGroup:
    """Synapses of one kinetic type, as arrays.

    Attributes
    ----------
    kinetics : SynapseKinetics
    compartment : ndarray of int64, shape (s,)
        Compartment of each synapse.
    weight_nS : ndarray, shape (s,)
        Peak conductance per event, nS.
    event_times_ms : ndarray, shape (e,)
        All events, sorted by time.
    event_synapse : ndarray of int64, shape (e,)
        Synapse receiving each event.
    """

    kinetics: SynapseKinetics
    compartment: np.ndarray
    weight_nS: np.ndarray
    event_times_ms: np.ndarray
    event_synapse: np.ndarray

    @staticmethod
    def from_synapses(kinetics: SynapseKinetics, sites: Sequence[Site], weights_nS: Sequence[float],
                      trains: Sequence) -> "SynapseGroup":
        """Build a group from one site, weight and event train per synapse."""
        if not (len(sites) == len(weights_nS) == len(trains)):
            raise CellModelError("synapses need one site, weight and event train each")
        w = np.asarray(weights_nS, dtype=float)
        if np.any(w < 0):
            raise CellModelError(f"synapse weights must be >= 0 nS, got {w[w < 0][0]}")
        times = [np.asarray(t.as_array() if hasattr(t, "as_array") else t, dtype=float) for t in trains]
        syn = np.concatenate([np.full(len(t), i, dtype=np.int64) for i, t in enumerate(times)]
                             or [np.zeros(0, np.int64)])
        allt = np.concatenate(times or [np.zeros(0)])
        order = np.argsort(allt, kind="stable")
        return SynapseGroup(kinetics, np.asarray([s.compartment for s in sites], dtype=np.int64),
                            w, allt[order], syn[order])


@dataclass(frozen=True, eq=False)
class CellModel:
    """Everything the solver needs, as arrays over compartments (grid order).

    Attributes
    ----------
    grid : Grid
    celsius : float
        Temperature, °C.
    capacitance_nF : ndarray, shape (n,)
    leak_uS, leak_reversal_mV : ndarray, shape (n,)
    axial_conductance_uS : ndarray, shape (n,)
        Conductance between each compartment and its parent, µS (0 for the root).
    membrane_values : dict of str to ndarray
        Per-compartment densities actually used (cm, leak, Ri, spine factor),
        for the compartment map.
    channels : tuple of ChannelBlock
    injections : tuple of CurrentInjection
    synapses : tuple of SynapseGroup
    recording_sites : tuple of Site
    """

    grid: Grid
    celsius: float
    capacitance_nF: np.ndarray
    leak_uS: np.ndarray
    leak_reversal_mV: np.ndarray
    axial_conductance_uS: np.ndarray
    membrane_values: dict = field(default_factory=dict)
    channels: tuple = ()
    injections: tuple = ()
    synapses: tuple = ()
    recording_sites: tuple = ()

    @property
    def n_compartments(self) -> int:
        """Number of compartments."""
        return self.grid.n_compartments

    @property
    def axial_diagonal_uS(self) -> np.ndarray:
        """Sum of the axial conductances at each compartment (to its parent and children), µS.

        The diagonal of the axial part of the tree matrix; its off-diagonal entries are
        ``-axial_conductance_uS`` between each compartment and its parent.
        """
        g = self.axial_conductance_uS
        return g + np.bincount(self.grid.parent[1:], g[1:], minlength=self.n_compartments)

    def breakpoints_ms(self) -> np.ndarray:
        """Sorted times where an injected current jumps, ms."""
        pts = [t for inj in self.injections for t in inj.waveform.breakpoints_ms()]
        return np.unique(np.asarray(pts, dtype=float))

    def with_inputs(self, *, injections=None, synapses=None, recording_sites=None,
                    celsius=None) -> "CellModel":
        """A copy with other inputs, recording sites or temperature (arrays shared)."""
        from dataclasses import replace
        changes = {}
        if injections is not None:
            changes["injections"] = tuple(injections)
        if synapses is not None:
            changes["synapses"] = tuple(synapses)
        if recording_sites is not None:
            changes["recording_sites"] = tuple(recording_sites)
        if celsius is not None:
            changes["celsius"] = float(celsius)
        cell = replace(self, **changes)
        _check_sites(cell)
        return cell


def _check_sites(cell: CellModel) -> None:
    n = cell.n_compartments
    sites = list(cell.recording_sites) + [inj.site for inj in cell.injections]
    for s in sites:
        if not 0 <= s.compartment < n:
            raise CellModelError(
                f"site {s.name!r} refers to compartment {s.compartment}; the grid has {n}")
    names = [s.name for s in cell.recording_sites]
    dupes = sorted({x for x in names if names.count(x) > 1})
    if dupes:
        raise CellModelError(f"recording site names must be unique; repeated: {dupes}")
    for g in cell.synapses:
        if g.compartment.size and (g.compartment.min() < 0 or g.compartment.max() >= n):
            raise CellModelError(f"a {g.kinetics.name} synapse lies off the grid (n={n})")


def _membrane_arrays(grid: Grid, membrane: Membrane, membrane_placements) -> dict:
    values = {name: membrane.per_compartment(name, grid.swc_type) for name in _MEMBRANE_PARAMETERS
              if name != "spine_factor"}
    values["spine_factor"] = np.ones(grid.n_compartments)
    claimed: dict[str, np.ndarray] = {}
    owner: dict[str, list] = {}
    for k, mp in enumerate(membrane_placements):
        if mp.parameter not in _MEMBRANE_PARAMETERS:
            raise ProfileError(
                f"membrane placement {k}: unknown parameter {mp.parameter!r}; expected one of "
                f"{list(_MEMBRANE_PARAMETERS)}")
        mask = mp.where.mask(grid)
        prev = claimed.setdefault(mp.parameter, np.zeros(grid.n_compartments, dtype=bool))
        clash = np.nonzero(prev & mask)[0]
        if clash.size:
            raise ProfileError(
                f"membrane placements {owner[mp.parameter][-1]} and {k} both set "
                f"{mp.parameter!r} on compartment {int(clash[0])} (path distance "
                f"{grid.path_distance_um[clash[0]]:.1f} µm); overlapping membrane placements "
                "are refused")
        prev |= mask
        owner.setdefault(mp.parameter, []).append(k)
        idx = np.nonzero(mask)[0]
        from .profiles import evaluate
        values[mp.parameter][idx] = evaluate(mp.value, grid, idx)
    for name, arr in values.items():
        bad = np.nonzero(~np.isfinite(arr) | ((arr <= 0) if name in (
            "cm_uF_per_cm2", "axial_resistivity_ohm_cm", "spine_factor") else (arr < 0)
            if name == "leak_S_per_cm2" else np.zeros(len(arr), bool)))[0]
        if bad.size:
            raise CellModelError(
                f"membrane {name} = {arr[bad[0]]!r} at compartment {int(bad[0])} is not allowed "
                "(capacitance, resistivity and spine factor must be > 0, leak >= 0)")
    return values


def _channel_blocks(grid: Grid, placements, spine_factor: np.ndarray) -> tuple[ChannelBlock, ...]:
    if not placements:
        return ()
    from .profiles import evaluate

    by_channel: dict[str, list] = {}
    order: list[Channel] = []
    for pl in placements:
        name = pl.channel.name
        if name not in by_channel:
            by_channel[name] = []
            order.append(pl.channel)
        elif by_channel[name][0].channel is not pl.channel and by_channel[name][0].channel != pl.channel:
            raise ProfileError(f"two different channels are both named {name!r}")
        by_channel[name].append(pl)
    blocks = []
    n = grid.n_compartments
    for ch in order:
        gsum = np.zeros(n)
        present = np.zeros(n, dtype=bool)
        rev = np.full(n, np.nan)
        params = np.full((len(ch.parameter_names), n), np.nan)
        for pl in by_channel[ch.name]:
            idx = np.nonzero(pl.where.mask(grid))[0]
            if idx.size == 0:
                continue
            g = np.asarray(evaluate(pl.gmax_S_per_cm2, grid, idx), dtype=float)
            neg = np.nonzero(~(g >= 0))[0]
            if neg.size:
                c = int(idx[neg[0]])
                raise ProfileError(
                    f"channel {ch.name!r}: gmax {g[neg[0]]!r} S/cm² at compartment {c} (path "
                    f"distance {grid.path_distance_um[c]:.1f} µm); conductances must be >= 0")
            gsum[idx] += g
            r = (np.full(idx.size, ch.reversal_mV) if pl.reversal_mV is None
                 else np.asarray(evaluate(pl.reversal_mV, grid, idx), dtype=float))
            pvals = ch.parameter_defaults
            given = dict(pl.parameters)
            pv = np.array([np.broadcast_to(np.asarray(evaluate(given[p], grid, idx), dtype=float)
                                           if p in given else pvals[p], idx.shape)
                           for p in ch.parameter_names]).reshape(len(ch.parameter_names), idx.size)
            overlap = present[idx]
            if np.any(overlap):
                o = np.nonzero(overlap)[0]
                if (not np.allclose(rev[idx[o]], r[o]) or
                        not np.allclose(params[:, idx[o]], pv[:, o])):
                    c = int(idx[o[0]])
                    raise ProfileError(
                        f"channel {ch.name!r}: overlapping placements at compartment {c} give "
                        "different reversal potentials or parameters; densities of overlapping "
                        "placements add, but their other values must agree")
            rev[idx] = r
            params[:, idx] = pv
            present[idx] = True
        index = np.nonzero(present)[0].astype(np.int64)
        g_density = gsum[index]
        blocks.append(ChannelBlock(
            channel=ch, index=index, gmax_S_per_cm2=g_density,
            gmax_uS=units.conductance_uS(g_density * spine_factor[index], grid.area_um2[index]),
            reversal_mV=rev[index], parameters=np.ascontiguousarray(params[:, index])))
    return tuple(blocks)


def build_cell(morphology: Morphology | Grid, *, membrane: Membrane = Membrane(),
               channels: Sequence = (), membrane_placements: Sequence = (),
               spacing: SpacingRule | None = None, celsius: float = 6.3,
               injections: Sequence[CurrentInjection] = (), synapses: Sequence[SynapseGroup] = (),
               recording_sites: Sequence[Site] | None = None) -> CellModel:
    """Assemble a cell model.

    Parameters
    ----------
    morphology : Morphology or Grid
        The tree; a Morphology is discretised with ``spacing`` (using the
        membrane's Ri and cm for the AC length-constant rule).
    membrane : Membrane
        Passive properties per SWC type.
    channels : sequence of ChannelPlacement
        Channels with density profiles and selectors (:mod:`cabletree.profiles`).
    membrane_placements : sequence of MembranePlacement
        Profiles of passive parameters (cm, leak, leak reversal, Ri, spine factor).
    spacing : SpacingRule, optional
        Used when ``morphology`` is a Morphology.
    celsius : float
        Temperature, °C.
    injections : sequence of CurrentInjection
    synapses : sequence of SynapseGroup
    recording_sites : sequence of Site, optional
        Default: the soma (root) only.

    Returns
    -------
    CellModel
    """
    if isinstance(morphology, Grid):
        grid = morphology
    else:
        grid = build_grid(morphology, spacing, axial_resistivity_ohm_cm=membrane.axial_resistivity_ohm_cm,
                          cm_uF_per_cm2=membrane.cm_uF_per_cm2)
    values = _membrane_arrays(grid, membrane, membrane_placements)
    f = values["spine_factor"]
    area = grid.area_um2
    g_axial = np.zeros(grid.n_compartments)
    nonroot = grid.parent >= 0
    g_axial[nonroot] = units.axial_conductance_uS(values["axial_resistivity_ohm_cm"][nonroot],
                                                  grid.resistance_integral_per_um[nonroot])
    cell = CellModel(
        grid=grid,
        celsius=float(celsius),
        capacitance_nF=units.capacitance_nF(values["cm_uF_per_cm2"] * f, area),
        leak_uS=units.conductance_uS(values["leak_S_per_cm2"] * f, area),
        leak_reversal_mV=values["leak_reversal_mV"].copy(),
        axial_conductance_uS=g_axial,
        membrane_values=values,
        channels=_channel_blocks(grid, channels, f),
        injections=tuple(injections),
        synapses=tuple(synapses),
        recording_sites=tuple(recording_sites) if recording_sites is not None else (soma_site(grid),),
    )
    _check_sites(cell)
    return cell
