"""Training configs: shipped recipes load; bad values give one line naming every bad field."""

from __future__ import annotations

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from trainkit.learning.config import BUILTIN_RECIPES, ConfigError, TrainConfig, load_train_config


@pytest.mark.parametrize("name", BUILTIN_RECIPES)
def test_recipes_load(name):
    cfg = load_train_config(name)
    assert isinstance(cfg, TrainConfig)


def test_every_field_is_documented_in_the_default_yaml():
    from importlib import resources

    text = resources.files("trainkit").joinpath("configs", "train", "default.yaml").read_text()
    for field in TrainConfig.model_fields:
        assert f"\n{field}:" in text
    for field in TrainConfig.model_fields["augment"].annotation.model_fields:
        assert f"\n  {field}:" in text


def test_errors_name_each_bad_field(tmp_path):
    p = tmp_path / "bad.yaml"
    p.write_text("epochs: many\nlr: -1\nbackbone: resnet9000\ncolour: blue\naugment:\n  blur: 2\n")
    with pytest.raises(ConfigError) as info:
        load_train_config(p)
    text = str(info.value)
    # One line (the CLI prints one `trainkit: ...` line), the five field errors joined by "; ".
    assert "\n" not in text and text.startswith(f"{p}: ")
    assert text.count("; ") >= 4
    assert (
        "epochs: " in text
        and "(got 'many')" in text
        and "lr: " in text
        and "(got -1)" in text
        and "colour: unknown key (got 'blue')" in text
        and "augment.blur: " in text
        and "(got 2)" in text
    )
    assert "unknown backbone 'resnet9000'; choose one of:" in text


def test_overrides_and_missing_file(tmp_path):
    assert load_train_config("demo", {"epochs": 3, "seed": None}).epochs == 3
    with pytest.raises(ConfigError, match="neither a built-in recipe"):
        load_train_config(tmp_path / "nope.yaml")
    (tmp_path / "list.yaml").write_text("- 1\n- 2\n")
    with pytest.raises(ConfigError, match="expected a mapping"):
        load_train_config(tmp_path / "list.yaml")


@settings(max_examples=60, deadline=None)
@given(
    epochs=st.one_of(st.integers(-5, 2000), st.text(max_size=4), st.floats(allow_nan=True)),
    lr=st.one_of(st.floats(allow_nan=True, allow_infinity=True), st.integers(-2, 3)),
)
def test_any_value_is_either_valid_or_a_config_error(epochs, lr):
    try:
        cfg = load_train_config("default", {"epochs": epochs, "lr": lr})
    except ConfigError as exc:
        assert str(exc).startswith("default:")
    else:
        assert 1 <= cfg.epochs <= 1000 and 0 < cfg.lr <= 1
