"""The fleet profile config/fleet.toml: it loads, validates, and changes only what it says."""

from __future__ import annotations

import tomllib
from dataclasses import fields, replace
from pathlib import Path
from typing import Any

import pytest

from livematch.config import load_config
from livematch.core.settings import MatchSettings
from livematch.errors import BadConfigError

PROFILE = Path(__file__).resolve().parent.parent / "config" / "fleet.toml"

#: The [matcher] keys the profile turns on, with the values measured in docs/measured.md,
#: "Session 14 (fleetprofile)".
FLEET_KEYS: dict[str, Any] = {"stand_turnback": True, "end_stand": True, "stand_short_m": 5.0,
                              "live_keep": 15.0}


def test_fleet_profile_loads_and_validates() -> None:
    """The shipped profile passes the daemon's own validation (every section, every key)."""
    config = load_config(PROFILE, env={})
    assert config.source.endswith("fleet.toml")
    assert config.inputs.network == str(PROFILE.parent / "region.lmnet")


def test_fleet_profile_matcher_is_defaults_plus_the_fleet_keys() -> None:
    """The profile's matcher is the built-in defaults with exactly the measured keys changed."""
    matcher = load_config(PROFILE, env={}).matcher
    expected = replace(MatchSettings(), eps_levels=(15.0, 30.0, 60.0), **FLEET_KEYS)
    assert matcher == expected
    changed = {f.name for f in fields(MatchSettings)
               if getattr(matcher, f.name) != getattr(MatchSettings(), f.name)}
    # eps_levels restates the default; a fleet key that has since become a default
    # (end_stand, on since session 14's endstand2; stand_turnback, on since session 15)
    # is still written out, and unchanged
    off_by_default = {k for k, v in FLEET_KEYS.items() if getattr(MatchSettings(), k) != v}
    assert changed == off_by_default
    assert off_by_default <= set(FLEET_KEYS) and "stand_short_m" in off_by_default


def test_fleet_profile_matcher_table_as_any_toml_reader_sees_it() -> None:
    """The [matcher] table read by Python's standard TOML 1.0 reader (tomllib, outside
    livematch's loader) holds the same keys and values that reach MatchSettings."""
    with PROFILE.open("rb") as fh:
        table = tomllib.load(fh)["matcher"]
    assert set(table) == {"eps_levels", *FLEET_KEYS}
    matcher = load_config(PROFILE, env={}).matcher
    for key, value in table.items():
        got = getattr(matcher, key)
        assert (tuple(got) if isinstance(got, tuple) else got) == (
            tuple(value) if isinstance(value, list) else value)


def test_fleet_profile_keys_still_validated_by_the_environment() -> None:
    """A variable overriding a profile key is validated like the file (a negative length
    names the key), so the profile cannot hide a bad override."""
    with pytest.raises(BadConfigError, match=r"stand_short_m"):
        load_config(PROFILE, env={"LIVEMATCH__MATCHER__STAND_SHORT_M": "-1"})
