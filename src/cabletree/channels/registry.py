"""The built-in channel models by name.

:data:`CHANNELS` maps each built-in channel's :attr:`~cabletree.channels.base.Channel.name`
to the channel; :func:`get_channel` looks one up with a helpful error.
"""

from __future__ import annotations

import difflib

from ..errors import ChannelError
from .base import Channel
from .connor_stevens import cs_a, cs_k, cs_na
from .hh1952 import hh_potassium, hh_sodium
from .ih_magee1998 import ih
from .migliore1999 import ka_distal, ka_proximal, kdr, na_dendritic

__all__ = ["CHANNELS", "get_channel"]

#: Every built-in channel by name.
CHANNELS: dict[str, Channel] = {ch.name: ch for ch in (
    hh_sodium, hh_potassium,
    cs_na, cs_k, cs_a,
    na_dendritic, kdr, ka_proximal, ka_distal,
    ih,
)}


def get_channel(name: str) -> Channel:
    """The built-in channel called ``name``.

    Parameters
    ----------
    name : str
        Channel name, e.g. ``"ka_distal"``.

    Returns
    -------
    Channel

    Raises
    ------
    ChannelError
        No built-in channel has that name; the message suggests close matches.
    """
    try:
        return CHANNELS[name]
    except (KeyError, TypeError):
        close = difflib.get_close_matches(str(name), list(CHANNELS), n=3, cutoff=0.5)
        hint = f"; did you mean {' or '.join(repr(c) for c in close)}?" if close else ""
        raise ChannelError(
            f"unknown channel {name!r}{hint} (built-in channels: {sorted(CHANNELS)})") from None
