"""Config validation: defaults, one-line errors naming the key, suggestions."""

import math

import pytest

from sigmasim.config import SCHEMA, config_from_dict, load_config
from sigmasim.errors import ConfigError


def test_defaults_round_trip():
    cfg = config_from_dict({})
    again = config_from_dict(cfg.to_dict())
    assert again == cfg
    assert cfg.physics_hash() == again.physics_hash()


def test_every_schema_key_is_a_config_field():
    cfg = config_from_dict({})
    for section, keys in SCHEMA.items():
        for key in keys:
            assert hasattr(cfg, key)


@pytest.mark.parametrize(
    "raw, words",
    [
        ({"modle": {}}, ["unknown key 'modle'", "model"]),
        ({"model": {"betta": 1.0}}, ["model.betta", "beta"]),
        ({"model": {"thermalize": 3}}, ["model.thermalize", "[run]"]),
        ({"model": {"nf": 9}}, ["model.nf", "between 1 and 8"]),
        ({"model": {"nf": 1, "group": "SU"}}, ["SU", "nf >= 2"]),
        ({"model": {"beta": "big"}}, ["model.beta", "number"]),
        ({"model": {"beta": math.nan}}, ["model.beta", "finite"]),
        ({"model": {"kappa": math.inf}}, ["model.kappa", "finite"]),
        ({"model": {"nf": 2, "mass": [1.0, 2.0, 3.0]}}, ["model.mass", "3 entries"]),
        ({"model": {"group": "O"}}, ["model.group", "U, SU"]),
        ({"lattice": {"shape": [8, 7]}}, ["lattice.shape", "even"]),
        ({"lattice": {"shape": [-4]}}, ["lattice.shape"]),
        ({"lattice": {"shape": 8}}, ["lattice.shape", "list"]),
        ({"run": {"measurements": 0}}, ["run.measurements"]),
        ({"run": {"thermalize": True}}, ["run.thermalize", "integer"]),
        ({"updates": {"schedule": [{"update": "heatbth"}]}}, ["heatbath"]),
        ({"updates": {"schedule": [{"update": "heatbath", "repeat": 0}]}}, ["repeat"]),
        ({"lattice": {"shape": [4096, 4096, 4096]}}, ["GiB"]),
        ({"name": "../x"}, ["name"]),
    ],
)
def test_bad_values_give_one_line_errors(raw, words):
    with pytest.raises(ConfigError) as info:
        config_from_dict(raw)
    msg = str(info.value)
    assert "\n" not in msg
    for w in words:
        assert w in msg


def test_degenerate_mass_broadcasts():
    cfg = config_from_dict({"model": {"nf": 3, "mass": -0.2}})
    assert cfg.mass == (-0.2, -0.2, -0.2)


@pytest.mark.parametrize("placement", ["mass", "anomaly", "split"])
def test_theta_placement_gives_the_same_physical_angle(placement):
    cfg = config_from_dict({"model": {"nf": 3, "theta": 2.1, "theta_placement": placement}})
    theta_m, theta_a = cfg.theta_angles
    assert math.isclose(3 * theta_m - theta_a, 2.1)


def test_load_config_errors(tmp_path):
    with pytest.raises(ConfigError, match="does not exist"):
        load_config(tmp_path / "nope.toml")
    bad = tmp_path / "bad.toml"
    bad.write_text("[model\nnf = 2\n")
    with pytest.raises(ConfigError, match="not valid TOML"):
        load_config(bad)
