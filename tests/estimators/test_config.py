"""Profiles from mappings (a lab's own settings): every key checked with its dotted path,
the same constructors as the built-in profiles, exact round trips."""

from __future__ import annotations

import re
from dataclasses import replace

import pytest

from estimators.config import (PROFILES, Profile, RateSettings, get_profile,
                               profile_from_dict)
from estimators.errors import ParameterError


@pytest.mark.parametrize("name", sorted(PROFILES))
def test_to_dict_reads_back_to_the_same_profile(name):
    assert profile_from_dict(PROFILES[name].to_dict()) == PROFILES[name]


def test_keys_left_out_come_from_the_base_profile():
    profile = profile_from_dict({"name": "lab", "base": "exercise-wrist",
                                 "hr": {"band_per_min": [45, 190], "lag_hops": 2}})
    base = PROFILES["exercise-wrist"]
    assert profile.name == "lab" and profile.description == ""
    assert profile.hr == replace(base.hr, band_per_min=(45.0, 190.0), lag_hops=2)
    assert isinstance(profile.hr.band_per_min[0], float)
    assert (profile.rr, profile.rr_pulse) == (base.rr, base.rr_pulse)
    assert profile.breathing_from_pulse is False


def test_a_profile_passes_where_a_name_does():
    own = profile_from_dict({"name": "lab", "base": "wrist"})
    assert get_profile(own) is own
    assert get_profile("wrist") is PROFILES["wrist"]


WRIST = {"name": "lab", "base": "wrist"}


@pytest.mark.parametrize("data, message", [
    (dict(WRIST, hr={"window_s": -1}), "hr.window_s=-1.0 must be > 0"),
    (dict(WRIST, rr={"gamma": 1.5}), "rr.gamma=1.5 must be in (0, 1]"),
    (dict(WRIST, hr={"window_s": "8"}), "hr.window_s='8' must be a number"),
    (dict(WRIST, hr={"deshape": 1}), "hr.deshape=1 must be true or false"),
    (dict(WRIST, rr_pulse={"lag_hops": 1.5}), "rr_pulse.lag_hops=1.5 must be a whole number"),
    (dict(WRIST, hr={"band_per_min": [40]}),
     "hr.band_per_min=[40] must be a list of 2 numbers"),
    (dict(WRIST, hr={"motion_trust": "always"}),
     "hr.motion_trust='always' must be one of track, everywhere, nowhere"),
    (dict(WRIST, hr={"hop_s": float("inf")}), "hr.hop_s=inf must be finite"),
    (dict(WRIST, hr={"windw_s": 8}), "hr.windw_s is not a setting (did you mean hr.window_s?)"),
    (dict(WRIST, colour="red"), "colour is not a setting (keys here are: name, description, "
                                "base, breathing_from_pulse, hr, rr, rr_pulse)"),
    (dict(WRIST, hr={"quantity": "rr"}), "hr.quantity='rr' must be 'hr'"),
    (dict(WRIST, hr=3), "hr must be a table of settings ([hr]), not 3"),
    # A key left out that the changed key now contradicts: say where its value came from.
    (dict(WRIST, hr={"window_s": 6}),
     "hr.min_window_s=8.0 must be in (0, window_s=6.0] (min_window_s comes from base "
     "profile 'wrist')"),
    ({"name": "lab", "base": "wirst"}, "base='wirst' must name a built-in profile: chest-ecg, "
                                       "exercise-wrist, fingertip-rest, resp-belt, wrist"),
    ({"base": "wrist"}, 'name is missing; give the profile a name (name = "my-lab")'),
    ({"name": "", "base": "wrist"}, "name='' must be a non-empty text"),
    ({"name": "lab", "breathing_from_pulse": True, "hr": {}},
     'hr.quantity is missing; give it, or take the keys left out from a built-in profile '
     'with base = "wrist"'),
])
def test_bad_settings_name_their_dotted_key(data, message):
    with pytest.raises(ParameterError, match=f"^{re.escape(message)}$"):
        profile_from_dict(data)


def test_a_profile_checks_the_quantity_of_each_table():
    with pytest.raises(ParameterError, match=re.escape("rr.quantity='hr' must be 'rr'")):
        Profile("lab", "", rr=RateSettings())
