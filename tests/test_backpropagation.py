"""Back-propagation of a somatic spike into an apical dendrite carrying an A-type
K gradient (the scientific heart of the tool), on a synthetic pyramidal cell and
on a real reconstruction.

Published facts checked (directions and minimum sizes, model-level):
- bAP amplitude falls with path distance along the apical dendrite
  (Stuart & Sakmann 1994, Nature 367:69-72; Spruston et al 1995, Science
  268:297-300);
- reducing the dendritic A-type density (a partial block, as 4-aminopyridine
  in Hoffman, Magee, Colbert & Johnston 1997, Nature 387:869-875, from memory)
  enlarges the distal bAP much more than the somatic spike;
- the density gradient itself (about five-fold over 350 µm, Hoffman 1997, from
  memory) shapes attenuation: the same total A-type conductance spread
  uniformly gives a different amplitude-distance curve (Migliore et al 1999,
  J Comput Neurosci 7:5-15).
"""

from pathlib import Path

import numpy as np
import pytest

from cabletree.analysis import bap_features
from cabletree.cell import CurrentInjection, Membrane, build_cell
from cabletree.channels.ih_magee1998 import ih
from cabletree.channels.migliore1999 import hoffman_gradient, ka_placements, kdr, na_dendritic
from cabletree.grid import SpacingRule, build_grid
from cabletree.inputs import StepCurrent
from cabletree.morphology import read_swc, synthetic
from cabletree.profiles import ChannelPlacement, Selector, Uniform
from cabletree.results import make_dataset
from cabletree.sites import Site, site_at_distance
from cabletree.solver import RunSettings, simulate

DISTANCES_UM = (0.0, 100.0, 200.0, 300.0)
MEMBRANE = Membrane(cm_uF_per_cm2=1.0, axial_resistivity_ohm_cm=150.0, leak_S_per_cm2=1 / 28_000,
                    leak_reversal_mV=-65.0)
KA_SOMA = 0.048  # S/cm² at the soma; ×5 at 350 µm


def _placements(ka_profile, na=0.032):
    return (ChannelPlacement(na_dendritic, na),
            ChannelPlacement(kdr, 0.01),
            *ka_placements(ka_profile),
            ChannelPlacement(ih, hoffman_gradient(5e-5, fold=6.0, at_um=350.0)))


def _bap(morph, ka_profile, apical_type=4, stim_nA=2.0):
    grid = build_grid(morph, SpacingRule(max_length_um=20.0, lambda_fraction=0.1),
                      axial_resistivity_ohm_cm=150.0, cm_uF_per_cm2=1.0)
    sites = [Site("soma", 0)] + [site_at_distance(grid, d, swc_types=(apical_type,),
                                                  name=f"apical_{d:g}um")
                                 for d in DISTANCES_UM[1:]]
    cell = build_cell(grid, membrane=MEMBRANE, channels=_placements(ka_profile), celsius=34.0,
                      injections=[CurrentInjection(sites[0], StepCurrent(stim_nA, 2.0, 1.0))],
                      recording_sites=sites)
    out = simulate(cell, RunSettings(t_stop_ms=14.0, dt_ms=0.025, record_interval_ms=0.025))
    feats = bap_features(make_dataset(cell, out), soma_site="soma")
    return feats["amplitude_mV"].values, cell


@pytest.fixture(scope="module")
def synthetic_cell():
    return synthetic.pyramidal_cell(seed=0)


@pytest.fixture(scope="module")
def control(synthetic_cell):
    return _bap(synthetic_cell, hoffman_gradient(KA_SOMA))


@pytest.mark.slow
def test_bap_attenuates_with_distance(control, record_property):
    amp, cell = control
    record_property("bap_amplitudes_mV_0_100_200_300", [round(float(a), 2) for a in amp])
    assert amp[0] > 80.0  # a full somatic spike
    assert np.all(np.diff(amp) < 0), f"amplitude should fall with distance, got {amp}"
    assert amp[-1] < 0.8 * amp[0]
    # the gradient in the compartment map: 5-fold at 350 µm (Hoffman 1997, from memory)
    ka = [b for b in cell.channels if b.channel.name == "ka_distal"][0]
    d = cell.grid.path_distance_um[ka.index]
    np.testing.assert_allclose(ka.gmax_S_per_cm2, KA_SOMA * (1 + 4 * d / 350), rtol=1e-12)


@pytest.mark.slow
def test_partial_block_enlarges_the_distal_bap(synthetic_cell, control, record_property):
    amp, _ = control
    blocked, _ = _bap(synthetic_cell, hoffman_gradient(0.5 * KA_SOMA))
    record_property("bap_amplitudes_50pct_block_mV", [round(float(a), 2) for a in blocked])
    gain = blocked / amp
    assert gain[-1] > 1.15, f"distal bAP should grow by >15 % with a 50 % block, got {gain}"
    assert gain[-1] > gain[1]
    assert abs(gain[0] - 1) < 0.1  # somatic spike changes little (Hoffman 1997)


@pytest.mark.slow
def test_removing_the_gradient_changes_attenuation(synthetic_cell, control):
    amp, cell = control
    # uniform density with the same total A-type conductance on the cell
    total = sum(float(np.sum(b.gmax_uS)) for b in cell.channels if b.channel.name.startswith("ka_"))
    area = float(np.sum(cell.grid.area_um2))
    uniform_density = total / (area * 1e-8 * 1e6)  # µS / (µm² → cm² · S→µS)
    flat, _ = _bap(synthetic_cell, Uniform(uniform_density))
    assert np.max(np.abs(flat[1:] - amp[1:])) > 5.0, (flat, amp)


@pytest.mark.slow
def test_block_enlarges_distal_bap_on_a_real_reconstruction(record_property):
    # L5 thick-tufted pyramidal cell (Hay et al 2013 reconstruction; tests/data/SOURCES.md).
    # The CA1-style gradient is imposed as a model experiment (REFERENCES §3(b) caveat: L5
    # apical K currents are not known to follow it).
    morph = read_swc(Path(__file__).parent / "data" / "l5_ttpc_pyramidal_rat_hay2013_cell4.swc")
    control, _ = _bap(morph, hoffman_gradient(KA_SOMA), stim_nA=4.0)
    blocked, _ = _bap(morph, hoffman_gradient(0.5 * KA_SOMA), stim_nA=4.0)
    record_property("l5_bap_control_mV", [round(float(a), 2) for a in control])
    record_property("l5_bap_block_mV", [round(float(a), 2) for a in blocked])
    assert np.all(np.diff(control) < 0)
    assert blocked[-1] > 1.1 * control[-1]
