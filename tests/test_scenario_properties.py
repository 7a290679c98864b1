"""Property test: any valid change of a scenario's values survives dump -> load unchanged."""

from pathlib import Path

try:
    import tomllib
except ImportError:  # Python 3.10
    import tomli as tomllib

from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from cabletree.scenario import dump_scenario, load_scenario, scenario_from_dict, with_overrides

ROOT = Path(__file__).resolve().parents[1]
BASE = load_scenario(ROOT / "scenarios" / "bap_gradient.toml")

finite = st.floats(min_value=1e-6, max_value=1e3, allow_nan=False, allow_infinity=False)


@settings(max_examples=25, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(gmax=finite, slope=st.floats(0.0, 1e-2), block=st.floats(0.0, 1.0),
       amplitude=st.floats(-5.0, 5.0), celsius=st.floats(5.0, 40.0),
       seed=st.integers(0, 2 ** 31 - 1))
def test_dump_load_round_trip(gmax, slope, block, amplitude, celsius, seed):
    s = with_overrides(BASE, {
        "channels.ka_gradient.gmax.value_at_zero": gmax,
        "channels.ka_gradient.gmax.slope_per_um": slope,
        "channels.ka_gradient.block_fraction": block,
        "inputs.step.amplitude_nA": amplitude,
        "run.celsius": celsius,
        "run.seed": seed,
    })
    back = scenario_from_dict(tomllib.loads(dump_scenario(s)), base_dir=s.base_dir,
                              source="<round trip>")
    assert back.data == s.data
