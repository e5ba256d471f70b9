"""Typed, validated training configuration loaded from YAML (one error line per bad field)."""

from __future__ import annotations

from pathlib import Path
from typing import Literal, cast

from pydantic import BaseModel, ConfigDict, Field, ValidationError, field_validator, model_validator

from trainkit.core.errors import TrainkitError
from trainkit.core.yamlfile import read_named_yaml

__all__ = [
    "AugmentConfig",
    "CascadeConfig",
    "TrainConfig",
    "ConfigError",
    "load_train_config",
    "recipe_patch_px",
    "BUILTIN_RECIPES",
]

BUILTIN_RECIPES = ("default", "demo", "scratch", "presence", "frozen")


class ConfigError(TrainkitError):
    """A configuration that failed validation; one line naming every bad field and value."""


class _Strict(BaseModel):
    model_config = ConfigDict(extra="forbid", frozen=True)


class AugmentConfig(_Strict):
    """Training-time augmentation; see configs/train/default.yaml for each field's meaning."""

    symmetries: bool = True
    photometric: float = Field(0.8, ge=0.0, le=1.0)
    brightness_contrast: float = Field(0.25, ge=0.0, le=1.0)
    gamma: tuple[float, float] = (0.8, 1.25)
    hue_saturation: bool = True
    shadow: float = Field(0.2, ge=0.0, le=1.0)
    blur: float = Field(0.15, ge=0.0, le=1.0)
    noise: float = Field(0.2, ge=0.0, le=1.0)
    jpeg: float = Field(0.2, ge=0.0, le=1.0)
    small_rotation_deg: float = Field(0.0, ge=0.0, le=15.0)


class CascadeConfig(_Strict):
    """The cheap first stage trained after the main network; see configs/train/default.yaml."""

    backbone: str = "stride4_cnn"
    weights: str | None = None
    input_px: int = Field(128, ge=16, le=1024)
    epochs: int = Field(20, ge=1, le=1000)
    batch_size: int = Field(64, ge=2, le=4096)
    lr: float = Field(3e-3, gt=0.0, le=1.0)
    teacher_weight: float = Field(0.5, ge=0.0, le=1.0)
    jitter: bool = True
    spare_pass_share: float = Field(0.05, ge=0.0, lt=1.0)

    @field_validator("backbone")
    @classmethod
    def _known_backbone(cls, v: str) -> str:
        return _known(v)


def _known(v: str) -> str:
    from trainkit.learning.models import BACKBONES

    if v not in BACKBONES:
        raise ValueError(f"unknown backbone {v!r}; choose one of: {', '.join(sorted(BACKBONES))}")
    return v


class TrainConfig(_Strict):
    """Everything that decides a training run; stored beside the run and in the checkpoint."""

    class_set: str = "orientation"
    backbone: str = "mobilenet_v3_small"
    weights: str | None = None
    patch_px: int | None = Field(None, ge=16, le=2048)
    epochs: int = Field(20, ge=1, le=1000)
    batch_size: int = Field(32, ge=1, le=4096)
    lr: float = Field(2e-3, gt=0.0, le=1.0)
    weight_decay: float = Field(1e-4, ge=0.0, le=1.0)
    warmup_epochs: float = Field(1.0, ge=0.0)
    label_smoothing: float = Field(0.05, ge=0.0, lt=1.0)
    class_weighting: Literal["none", "balanced", "sqrt"] = "sqrt"
    early_stop_patience: int = Field(0, ge=0)
    head_epochs: int = Field(0, ge=0)
    backbone_lr_scale: float = Field(1.0, gt=0.0, le=1.0)
    freeze_bn_stats: bool = False
    cached_features: bool = False
    sampling: Literal["shuffle", "balanced"] = "shuffle"
    select_on: Literal["recall_at_fa", "macro_recall"] = "recall_at_fa"
    false_alarm_budget: float = Field(0.05, gt=0.0, lt=1.0)
    seed: int = 0
    threads: int | None = Field(None, ge=1, le=512)
    prefetch: bool = True
    bf16: bool = False
    compile: bool = False
    augment: AugmentConfig = AugmentConfig()
    cascade: CascadeConfig | None = None

    @field_validator("backbone")
    @classmethod
    def _known_backbone(cls, v: str) -> str:
        return _known(v)

    @model_validator(mode="after")
    def _consistent(self) -> TrainConfig:
        if self.head_epochs > self.epochs:
            raise ValueError(
                f"head_epochs ({self.head_epochs}) cannot exceed epochs ({self.epochs})"
            )
        if self.cached_features and self.head_epochs == 0:
            raise ValueError(
                "cached_features trains the head on frozen features: set head_epochs > 0 "
                "(head_epochs = epochs for a head-only run)"
            )
        if self.sampling == "balanced" and self.class_weighting != "none":
            raise ValueError(
                "sampling 'balanced' already evens out the classes; set class_weighting: none "
                "(or keep sampling: shuffle with class weights)"
            )
        return self


def _format_errors(exc: ValidationError, source: str) -> str:
    """One line: the source, then each field error (field, problem, bad value) joined by '; '."""
    parts = []
    for err in exc.errors():
        field = ".".join(str(p) for p in err["loc"]) or "(top level)"
        msg = err["msg"]
        if err["type"] == "extra_forbidden":
            msg = "unknown key"
        if not err["loc"]:  # a rule across fields: the message names them
            parts.append(msg.removeprefix("Value error, "))
            continue
        parts.append(f"{field}: {msg} (got {err.get('input')!r})")
    return f"{source}: " + "; ".join(" ".join(p.split()) for p in parts)


def _read_recipe(name_or_path: str | Path) -> object:
    return read_named_yaml(
        name_or_path, builtins=BUILTIN_RECIPES, folder="train", kind="recipe", error=ConfigError
    )


def recipe_patch_px(name: str = "default") -> int:
    """The patch size in pixels a built-in recipe is made for (read without building the recipe).

    Reading the one key keeps ``trainkit --help`` from importing torch, which building the
    recipe does (its backbone name is checked against the registry).
    """
    return int(cast(dict, _read_recipe(name))["patch_px"])


def load_train_config(
    name_or_path: str | Path = "default", overrides: dict | None = None
) -> TrainConfig:
    """Load a built-in recipe by name or a YAML file by path, then apply overrides."""
    source = str(name_or_path)
    data = _read_recipe(name_or_path) or {}
    if not isinstance(data, dict):
        raise ConfigError(f"{source}: expected a mapping of settings, got {type(data).__name__}")
    for k, v in (overrides or {}).items():
        if v is not None:
            data[k] = v
    try:
        return TrainConfig.model_validate(data)
    except ValidationError as exc:
        raise ConfigError(_format_errors(exc, source)) from None
