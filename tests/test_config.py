"""Stage configs: TOML in, typed dataclass out; unknown keys and wrong types name the key."""
from __future__ import annotations

from pathlib import Path

import pytest

from limner.compress.train import TrainConfig
from limner.runtime.config import ConfigError, dumps_toml, load

REPO = Path(__file__).resolve().parents[1]


def test_bundled_train_configs_load():
    for path in (REPO / "configs" / "train").glob("*.toml"):
        cfg = load(TrainConfig, path)
        assert cfg.steps >= 1


def test_unknown_key_is_named(tmp_path):
    p = tmp_path / "c.toml"
    p.write_text("size = 128\nstyle_wieght = 3.0\n")
    with pytest.raises(ConfigError, match="unknown key 'style_wieght'"):
        load(TrainConfig, p)


def test_wrong_type_is_named(tmp_path):
    p = tmp_path / "c.toml"
    p.write_text('steps = "many"\n')
    with pytest.raises(ConfigError, match="steps: 'many' is not an integer"):
        load(TrainConfig, p)


def test_bad_value_is_named():
    with pytest.raises(ConfigError, match="size=30"):
        load(TrainConfig, None, {"size": 30})


def test_resolved_config_round_trips(tmp_path):
    cfg = load(TrainConfig, None, {"steps": 7, "style_weight": 2.5})
    p = tmp_path / "resolved.toml"
    p.write_text(dumps_toml(cfg))
    assert load(TrainConfig, p) == cfg
