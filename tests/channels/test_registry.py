"""The channel registry and the user-channel example of the package docstring."""

import doctest

import pytest

import cabletree.channels as channels
from cabletree.channels import CHANNELS, Channel, get_channel
from cabletree.errors import ChannelError


def test_every_builtin_registered_by_name_with_a_reference():
    expected = {"hh_na", "hh_k", "cs_na", "cs_k", "cs_a", "na_dendritic", "kdr",
                "ka_proximal", "ka_distal", "ih"}
    assert set(CHANNELS) == expected
    for name, ch in CHANNELS.items():
        assert isinstance(ch, Channel) and ch.name == name
        assert "19" in ch.reference  # a year: every built-in cites its source
        assert get_channel(name) is ch


def test_unknown_name_suggests_close_match():
    with pytest.raises(ChannelError, match=r"unknown channel 'ka_dist'; did you mean 'ka_distal'"):
        get_channel("ka_dist")
    with pytest.raises(ChannelError, match=r"unknown channel 'zzz' \(built-in channels: \["):
        get_channel("zzz")


def test_package_docstring_example_runs():
    result = doctest.testmod(channels, raise_on_error=False)
    assert result.attempted >= 8 and result.failed == 0
