"""Channel models: the gate formalism and the library of published models.

Built-in channels (see :data:`CHANNELS`; each module cites its source):

=================  ==========================================================
``hh_na``, ``hh_k``  Hodgkin & Huxley 1952 squid axon (:mod:`.hh1952`)
``cs_na``, ``cs_k``,  Connor, Walter & McKown 1977 as in Dayan & Abbott 2001
``cs_a``             (:mod:`.connor_stevens`)
``ka_proximal``,     A-type K of CA1 dendrites, Migliore, Hoffman, Magee &
``ka_distal``        Johnston 1999 (:mod:`.migliore1999`)
``na_dendritic``,    fast Na and delayed rectifier of that model family,
``kdr``              kinetics from memory (:mod:`.migliore1999`)
``ih``               HCN current after Magee 1998 (:mod:`.ih_magee1998`)
=================  ==========================================================

Writing your own channel
------------------------
A channel is a :class:`Channel` made of :class:`Gate` objects whose rate functions
follow the rules in :mod:`cabletree.channels.base` (signature
``f(v_mV, celsius, p)``, plain numpy arithmetic, no ``if`` on values).  For example
a non-inactivating potassium current with one Boltzmann activation gate (an
illustration with made-up constants, not a published model) whose half-activation
can be given a profile over the tree:

>>> import numpy as np
>>> from cabletree.channels import Channel, Gate
>>> def w_inf(v, celsius, p):
...     return 1.0 / (1.0 + np.exp(-(v - p.v_half_mV) / 10.0))
>>> def w_tau(v, celsius, p):
...     return 5.0 + 20.0 * np.exp(-((v + 40.0) / 25.0) ** 2)
>>> slow_k = Channel(
...     name="slow_k",
...     gates=(Gate("w", 1, steady_state=w_inf, tau_ms=w_tau),),
...     reversal_mV=-85.0,
...     q10=3.0, reference_celsius=22.0,
...     parameters=(("v_half_mV", -35.0),),
...     reference="illustration only",
... )
>>> p = slow_k.make_parameters({"v_half_mV": -30.0})
>>> (w,) = slow_k.steady_state(-30.0, 22.0, p)
>>> float(w)
0.5
>>> inf, tau = slow_k.gates[0].inf_tau(-40.0, 32.0, p, slow_k.temperature_factor(32.0))
>>> round(float(tau), 6)  # 25 ms at 22 °C, 3x faster at 32 °C
8.333333

Such a channel is placed on a cell exactly like a built-in one, with
:class:`cabletree.profiles.ChannelPlacement`.
"""

from .base import Channel, Gate, linear_rate, q10_factor
from .connor_stevens import (
    CS_A_GMAX_S_PER_CM2,
    CS_CM_UF_PER_CM2,
    CS_LEAK_REVERSAL_MV,
    CS_LEAK_S_PER_CM2,
    CS_POTASSIUM_GMAX_S_PER_CM2,
    CS_SODIUM_GMAX_S_PER_CM2,
    cs_a,
    cs_k,
    cs_na,
)
from .hh1952 import (
    HH_CM_UF_PER_CM2,
    HH_LEAK_REVERSAL_MV,
    HH_LEAK_S_PER_CM2,
    HH_POTASSIUM_GMAX_S_PER_CM2,
    HH_SODIUM_GMAX_S_PER_CM2,
    hh_potassium,
    hh_sodium,
)
from .ih_magee1998 import IH_REVERSAL_MV, ih
from .migliore1999 import (
    MIGLIORE_EK_MV,
    PROXIMAL_DISTAL_BOUNDARY_UM,
    hoffman_gradient,
    ka_distal,
    ka_placements,
    ka_proximal,
    kdr,
    na_dendritic,
    thermal_factor_per_mV,
)
from .registry import CHANNELS, get_channel

__all__ = [
    "Channel", "Gate", "linear_rate", "q10_factor",
    "CHANNELS", "get_channel",
    "hh_sodium", "hh_potassium", "HH_SODIUM_GMAX_S_PER_CM2", "HH_POTASSIUM_GMAX_S_PER_CM2",
    "HH_LEAK_S_PER_CM2", "HH_LEAK_REVERSAL_MV", "HH_CM_UF_PER_CM2",
    "cs_na", "cs_k", "cs_a", "CS_SODIUM_GMAX_S_PER_CM2", "CS_POTASSIUM_GMAX_S_PER_CM2",
    "CS_A_GMAX_S_PER_CM2", "CS_LEAK_S_PER_CM2", "CS_LEAK_REVERSAL_MV", "CS_CM_UF_PER_CM2",
    "ka_proximal", "ka_distal", "na_dendritic", "kdr", "thermal_factor_per_mV",
    "hoffman_gradient", "ka_placements", "PROXIMAL_DISTAL_BOUNDARY_UM", "MIGLIORE_EK_MV",
    "ih", "IH_REVERSAL_MV",
]
