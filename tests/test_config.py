"""Stage configs: TOML in, typed dataclass out; unknown keys and wrong types name the key."""
from __future__ import annotations

from pathlib import Path

import pytest

from limner.compress.recipe import Recipe
from limner.compress.train import TrainConfig
from limner.runtime.config import ConfigError, dumps_toml, load

REPO = Path(__file__).resolve().parents[1]


def test_bundled_train_configs_load():
    for path in (REPO / "configs" / "train").glob("*.toml"):
        cfg = load(TrainConfig, path)
        assert cfg.steps >= 1


def test_train_config_warm_starts_survive_bundling():
    """A teacher config's init is a committed file, and never the bundled teacher of its own
    style, which tools/bundle_teacher.py overwrites with the result (common practice, no
    source: a second stage must start from the same weights when rerun from a fresh clone)."""
    with_init = 0
    for path in sorted((REPO / "configs" / "train").glob("*.toml")):
        cfg = load(TrainConfig, path)
        if not cfg.init:
            continue
        with_init += 1
        style = path.stem.split("-")[0]
        assert (REPO / cfg.init).is_file(), f"{path.name}: init {cfg.init} missing"
        assert Path(cfg.init) != Path(f"compress/assets/{style}-teacher.pt"), \
            f"{path.name}: init {cfg.init} is overwritten when the result is bundled"
    assert with_init >= 3


def test_bundled_recipes_load_and_their_warm_starts_exist():
    """Each configs/compress recipe loads, and every student's init is a file in the repository,
    the checkpoint of a student that runs earlier in the same recipe, or the checkpoint that
    another committed recipe writes when run as its header says (`-o runs/STEM`), with that
    recipe named in this one's header as the run to do first (common practice, no source: a
    recipe that a fresh clone cannot run is a broken record of how a ladder was built)."""
    folder = REPO / "configs" / "compress"
    recipes = sorted(folder.glob("*.toml"))
    assert {"ember-hed.toml", "short-hed.toml"} <= {p.name for p in recipes}
    chained = 0
    for path in recipes:
        recipe = load(Recipe, path)
        header = path.read_text()
        earlier: set[str] = set()
        for s in recipe.student:
            if s.init:
                init = Path(s.init)
                made_here = init.parts[-3:-1] in {("work", n) for n in earlier} and init.name == "checkpoint.pt"
                made_before = False
                if not made_here and len(init.parts) == 5 and init.parts[0] == "runs" \
                        and init.parts[2:5:2] == ("work", "checkpoint.pt"):
                    _, stem, _, student, _ = init.parts   # runs/STEM/work/STUDENT/checkpoint.pt
                    other = folder / f"{stem}.toml"
                    made_before = (other.is_file()
                                   and f"configs/compress/{stem}.toml" in header
                                   and f"-o runs/{stem}" in other.read_text()
                                   and student in {t.name for t in load(Recipe, other).student})
                    chained += made_before
                assert made_here or made_before or (REPO / init).is_file(), \
                    f"{path.name}: student {s.name}: init {s.init} missing"
            earlier.add(s.name)
    assert chained >= 1  # ember-long-half6 continues ember-deep-128's student


def test_base_include_merges_tables_and_replaces_lists(tmp_path):
    """`base = "FILE"`: the named TOML (relative to the including file) is read first; tables
    merge key by key, lists and arrays of tables are replaced whole, the file's own keys win
    (common practice for layered configs, no source). Parsing itself is TOML 1.0 via tomllib."""
    (tmp_path / "common").mkdir()
    (tmp_path / "common" / "shared.toml").write_text(
        'crop = 96\nbatch = 2\n[loss]\ngram = 0.5\nfeature = 2.0\nfeature_layers = ["relu2_2", "relu3_3"]\n'
        '[[student]]\nname = "from-base"\nknobs = {width = 0.5}\n')
    top = tmp_path / "r.toml"
    top.write_text('base = "common/shared.toml"\nbatch = 3\n[loss]\ngram = 3.0\nfeature_layers = ["relu2_2"]\n'
                   '[[student]]\nname = "own"\nknobs = {width = 0.25}\n')
    r = load(Recipe, top)
    assert (r.crop, r.batch) == (96, 3)                       # kept from base, overridden
    assert (r.loss.gram, r.loss.feature) == (3.0, 2.0)        # table merged key by key
    assert r.loss.feature_layers == ["relu2_2"]               # list replaced, not appended
    assert [s.name for s in r.student] == ["own"]             # array of tables replaced
    assert "base" not in dumps_toml(r)                        # the saved config is resolved


def test_base_include_errors_name_the_file(tmp_path):
    a, b = tmp_path / "a.toml", tmp_path / "b.toml"
    a.write_text('base = "b.toml"\n')
    b.write_text('base = "a.toml"\n')
    with pytest.raises(ConfigError, match=r"includes itself \(a.toml -> b.toml -> a.toml\)"):
        load(Recipe, a)
    a.write_text('base = "missing.toml"\n')
    with pytest.raises(ConfigError, match=r"base = 'missing.toml': no such file"):
        load(Recipe, a)
    a.write_text("base = 3\n")
    with pytest.raises(ConfigError, match="base = 3: expected the path"):
        load(Recipe, a)


def test_recipes_share_their_common_settings():
    """Every HED ladder recipe names configs/compress/common/hed-distill.toml instead of
    repeating its [loss] and [int8] blocks (the resolved values are what the runs used)."""
    for path in sorted((REPO / "configs" / "compress").glob("*.toml")):
        text = path.read_text()
        if 'loss_net = "hed"' in text or "base =" in text:
            assert 'base = "common/hed-distill.toml"' in text, path.name
            assert "[int8]" not in text, f"{path.name} repeats the shared [int8] block"
            assert load(Recipe, path).loss_net == "hed"


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
