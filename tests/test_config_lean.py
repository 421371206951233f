"""The lean profile config/lean.toml: it loads, validates, and changes only what it says."""

from __future__ import annotations

import tomllib
from dataclasses import fields, replace
from pathlib import Path
from typing import Any

import pytest

from livematch.config import load_config
from livematch.core.settings import MatchSettings
from livematch.errors import BadConfigError

PROFILE = Path(__file__).resolve().parent.parent / "config" / "lean.toml"

#: The [matcher] keys the profile sets: the ladder without its 60 m level, with today's
#: off-network radius and join margin kept (docs/measured.md, "Session 26 (radius26)").
LEAN_KEYS: dict[str, Any] = {"eps_levels": (15.0, 30.0), "off_network_m": 60.0,
                             "join_margin_m": 120.0}


def test_lean_profile_loads_and_validates() -> None:
    """The shipped profile passes the daemon's own validation (every section, every key)."""
    config = load_config(PROFILE, env={})
    assert config.source.endswith("lean.toml")


def test_lean_profile_matcher_is_defaults_plus_the_lean_keys() -> None:
    """The profile's matcher is the built-in defaults with exactly the three keys changed,
    and the radius and margin it keeps are what today's ladder gives: its largest eps and
    twice that (the default ladder's own, read from MatchSettings, not restated here)."""
    matcher = load_config(PROFILE, env={}).matcher
    assert matcher == replace(MatchSettings(), **LEAN_KEYS)
    changed = {f.name for f in fields(MatchSettings)
               if getattr(matcher, f.name) != getattr(MatchSettings(), f.name)}
    assert changed == set(LEAN_KEYS)
    today = MatchSettings()
    assert matcher.off_network_radius() == max(today.eps_levels) == today.off_network_radius()
    assert matcher.join_margin() == 2 * max(today.eps_levels) == today.join_margin()
    assert max(matcher.eps_levels) < max(today.eps_levels)


def test_lean_profile_matcher_table_as_any_toml_reader_sees_it() -> None:
    """The [matcher] table read by Python's standard TOML 1.0 reader (tomllib, outside
    livematch's loader) holds the same keys and values that reach MatchSettings."""
    with PROFILE.open("rb") as fh:
        table = tomllib.load(fh)["matcher"]
    assert set(table) == set(LEAN_KEYS)
    matcher = load_config(PROFILE, env={}).matcher
    for key, value in table.items():
        got = getattr(matcher, key)
        assert (tuple(got) if isinstance(got, tuple) else got) == (
            tuple(value) if isinstance(value, list) else value)


def test_lean_profile_radius_checked_against_an_overridden_ladder() -> None:
    """An environment variable that puts the 60 m level back above a smaller radius is
    fine; one that raises the ladder above the profile's 60 m radius is refused, naming
    the key (the radius must be 0 or at least the largest eps)."""
    load_config(PROFILE, env={"LIVEMATCH__MATCHER__EPS_LEVELS": "[15, 30, 60]"})
    with pytest.raises(BadConfigError, match=r"matcher\.off_network_m must be 0"):
        load_config(PROFILE, env={"LIVEMATCH__MATCHER__EPS_LEVELS": "[15, 30, 90]"})
