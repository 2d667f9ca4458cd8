"""TOML config files → typed, validated config objects.

Every section is a frozen dataclass. Field metadata states what a value may be (``choices``, ``min``,
``max``); one generic validator reads it, so every error has the same form::

    model.upsample: 'bicubic' is not one of: transposed, bilinear
"""

from __future__ import annotations

import difflib
import tomllib
import types
import typing
from collections.abc import Callable
from dataclasses import MISSING, asdict, dataclass, field, fields
from pathlib import Path
from typing import Any

from fcnkit.errors import ConfigError
from fcnkit.inputfiles import require_regular


def _opt(default: Any, **rules: Any) -> Any:
    """A dataclass field with a default and validation rules (choices=, min=, max=)."""
    if isinstance(default, list):
        return field(default_factory=lambda: list(default), metadata=rules)
    return field(default=default, metadata=rules)


@dataclass(frozen=True)
class ModelConfig:
    """The net: encoder stages, 1×1-convolution head, up-sampling and skip fusion."""

    bands: int | None = _opt(None, min=1, max=1024)  # None: from the training data
    num_classes: int | None = _opt(None, min=2, max=255)  # None: from the training data
    widths: list[int] = _opt([16, 32, 64, 128], min=1, max=4096)
    blocks: list[int] | None = _opt(None, min=1, max=32)
    strides: list[int] | None = _opt(None, choices=(1, 2, 3, 4))
    dilations: list[int] | None = _opt(None, min=1, max=64)
    kernel: int = _opt(3, choices=(1, 3, 5, 7))
    down: str = _opt("maxpool", choices=("maxpool", "conv"))
    norm: str = _opt("batch", choices=("batch", "group", "none"))
    groups: int = _opt(8, min=1, max=4096)
    head: list[int] = _opt([], min=1, max=8192)
    dropout: float = _opt(0.0, min=0.0, max=0.95)
    upsample: str = _opt("transposed", choices=("transposed", "bilinear"))
    fusion: str = _opt("none", choices=("none", "sum", "concat"))
    skips: list[int] | None = _opt(None, min=1)
    min_size: int = _opt(32, min=1)

    def stage_blocks(self) -> list[int]:
        return list(self.blocks) if self.blocks is not None else [2] * len(self.widths)

    def stage_strides(self) -> list[int]:
        return list(self.strides) if self.strides is not None else [1] + [2] * (len(self.widths) - 1)

    def stage_dilations(self) -> list[int]:
        return list(self.dilations) if self.dilations is not None else [1] * len(self.widths)

    def stage_output_strides(self) -> list[int]:
        """Down-sampling factor of each encoder stage's output relative to the input."""
        out, acc = [], 1
        for s in self.stage_strides():
            acc *= s
            out.append(acc)
        return out

    def skip_strides(self) -> list[int]:
        """Strides fused into the output, deepest first (empty for fusion = none). By default ``sum`` fuses
        the two encoder strides next below the deepest (16 and 8 under 32, as FCN-8s) and ``concat`` every
        shallower stride (U-Net)."""
        if self.fusion == "none":
            return []
        if self.skips is not None:
            return sorted(set(self.skips), reverse=True)
        deepest = self.stage_output_strides()[-1]
        shallower = sorted({s for s in self.stage_output_strides() if s < deepest}, reverse=True)
        return shallower if self.fusion == "concat" else shallower[:2]


@dataclass(frozen=True)
class TrainConfig:
    """Optimisation, sampling and augmentation settings used by ``fcnkit train``."""

    epochs: int = _opt(20, min=1)
    batch: int = _opt(8, min=1)
    patch: int = _opt(128, min=8)
    patches_per_epoch: int = _opt(256, min=1)
    balanced: bool = _opt(False)
    optimizer: str = _opt("adamw", choices=("adamw", "sgd"))
    lr: float = _opt(2e-3, min=0.0)
    momentum: float = _opt(0.9, min=0.0, max=1.0)
    weight_decay: float = _opt(1e-4, min=0.0)
    schedule: str = _opt("cosine", choices=("cosine", "poly", "constant"))
    warmup: int = _opt(0, min=0)
    class_weights: str = _opt("none", choices=("none", "median"))
    dice: float = _opt(0.0, min=0.0)
    val_fraction: float = _opt(0.2, min=0.0, max=0.9)
    calibrate: bool = _opt(True)  # fit a temperature on the validation split after training (Guo et al. 2017)
    patience: int = _opt(0, min=0)
    augment: bool = _opt(True)
    scale: list[float] = _opt([0.75, 1.25], min=0.1)
    channels_last: bool = _opt(True)
    bf16: bool = _opt(False)
    threads: int = _opt(0, min=0)
    seed: int = _opt(0, min=0)
    workers: int = _opt(0, min=0)


@dataclass(frozen=True)
class Config:
    """A whole config file."""

    model: ModelConfig = field(default_factory=ModelConfig)
    train: TrainConfig = field(default_factory=TrainConfig)


_SECTIONS = {"model": ModelConfig, "train": TrainConfig}


SHIPPED = Path(__file__).resolve().parent / "configs"  # the configs installed with fcnkit


def shipped_configs() -> list[str]:
    """Names of the configs that come with fcnkit (``load_config`` takes them in place of a path)."""
    return sorted(p.stem for p in SHIPPED.glob("*.toml"))


def load_config(path: str | Path, note: Callable[[str], None] | None = None) -> Config:
    """Read and validate a TOML config file, or a shipped config by name (e.g. ``demo``). ``note`` receives a
    one-line remark when the file uses an older spelling of a key."""
    path = Path(path)
    if not path.exists() and path.suffix == "" and len(path.parts) == 1 and (SHIPPED / f"{path}.toml").is_file():
        path = SHIPPED / f"{path}.toml"
    require_regular(path, ConfigError)
    try:
        text = path.read_text(encoding="utf-8")
    except FileNotFoundError:
        raise ConfigError(f"{path}: no such config file (or shipped config: {', '.join(shipped_configs())})") from None
    except IsADirectoryError:
        raise ConfigError(f"{path}: is a directory, expected a TOML config file") from None
    except UnicodeDecodeError:
        raise ConfigError(f"{path}: not a text file (not UTF-8), expected a TOML config file") from None
    except OSError as e:
        raise ConfigError(f"{path}: cannot read config file ({e.strerror or e.__class__.__name__})") from None
    try:
        table = tomllib.loads(text)
    except tomllib.TOMLDecodeError as e:
        detail = " ".join(str(e).split())
        raise ConfigError(f"{path}: not valid TOML ({detail}); expected a TOML config file") from None
    except RecursionError:
        raise ConfigError(f"{path}: arrays or tables nested too deeply to read; expected a TOML config file") from None
    try:
        return config_from_dict(table, note=(lambda text: note(f"{path}: {text}")) if note else None)
    except ConfigError as e:
        raise ConfigError(f"{path}: {e}") from None


RENAMED = {("model", "classes"): "num_classes"}
"""Keys renamed since earlier versions, still read: ``model.classes`` was a count beside ``--classes`` files."""


def config_from_dict(table: dict[str, Any], note: Callable[[str], None] | None = None) -> Config:
    """Validate a plain nested dict (as read from TOML or model-file metadata) into a Config; keys of
    :data:`RENAMED` are read under their new name, with a one-line ``note`` when given."""
    if not isinstance(table, dict):
        raise ConfigError(f"config: expected a table, got {type(table).__name__}")
    table = _renamed(table, note)
    _reject_unknown(table, _SECTIONS, "")
    sections = {}
    for name, cls in _SECTIONS.items():
        sub = table.get(name, {})
        if not isinstance(sub, dict):
            raise ConfigError(f"{name}: expected a table, got {_show(sub)}")
        sections[name] = _section(cls, sub, name)
    cfg = Config(**sections)
    _check_model(cfg.model)
    _check_train(cfg.train)
    return cfg


def config_to_dict(cfg: Config) -> dict[str, Any]:
    """Plain dict of every resolved value (None entries dropped, so it round-trips through TOML/JSON)."""
    return {k: {kk: vv for kk, vv in v.items() if vv is not None} for k, v in asdict(cfg).items()}


def replace_section(cfg: Config, section: str, **changes: Any) -> Config:
    """A copy of ``cfg`` with some keys of one section changed, re-validated."""
    table = config_to_dict(cfg)
    _reject_unknown({section: None}, _SECTIONS, "")
    table[section].update(changes)
    return config_from_dict(table)


# --- validation -------------------------------------------------------------------------------------


def _renamed(table: dict[str, Any], note: Callable[[str], None] | None) -> dict[str, Any]:
    table = dict(table)
    for (section, old), new in RENAMED.items():
        sub = table.get(section)
        if not isinstance(sub, dict) or old not in sub:
            continue
        if new in sub:
            raise ConfigError(f"{section}.{old}: give only {section}.{new} (the new name of the same key)")
        table[section] = {(new if k == old else k): v for k, v in sub.items()}
        if note:
            note(f"{section}.{old} is now spelled {section}.{new}; read as such")
    return table


def _show(v: Any) -> str:
    return repr(v) if isinstance(v, str) else f"{v!r} ({type(v).__name__})" if not isinstance(v, bool) else repr(v)


def _reject_unknown(table: dict, known: Any, prefix: str) -> None:
    for key in table:
        if key not in known:
            close = difflib.get_close_matches(key, list(known), n=1, cutoff=0.6)
            hint = f" (did you mean '{close[0]}'?)" if close else ""
            allowed = ", ".join(known)
            raise ConfigError(f"{prefix}{key}: unknown key{hint}; allowed: {allowed}")


def _section(cls: type, table: dict[str, Any], name: str) -> Any:
    hints = typing.get_type_hints(cls)
    known = {f.name: f for f in fields(cls)}
    _reject_unknown(table, known, f"{name}.")
    values = {}
    for key, f in known.items():
        if key not in table:
            continue
        values[key] = _check_value(table[key], hints[key], f.metadata, f"{name}.{key}")
    for key, f in known.items():
        if key not in values and f.default is MISSING and f.default_factory is MISSING:
            raise ConfigError(f"{name}.{key}: missing")
    return cls(**values)


def _check_value(value: Any, hint: Any, rules: typing.Mapping[str, Any], path: str) -> Any:
    args = typing.get_args(hint)
    if isinstance(hint, types.UnionType) and type(None) in args:  # optional: None means "default"
        if value is None:
            return None
        hint = next(a for a in args if a is not type(None))
        args = typing.get_args(hint)
    if typing.get_origin(hint) is list:
        if not isinstance(value, list):
            raise ConfigError(f"{path}: expected a list of {args[0].__name__}, got {_show(value)}")
        return [_check_value(v, args[0], rules, f"{path}[{i}]") for i, v in enumerate(value)]
    return _check_scalar(value, hint, rules, path)


def _check_scalar(value: Any, hint: type, rules: typing.Mapping[str, Any], path: str) -> Any:
    if hint is bool:
        ok = isinstance(value, bool)
    elif hint is int:
        ok = isinstance(value, int) and not isinstance(value, bool)
    elif hint is float:
        ok = isinstance(value, (int, float)) and not isinstance(value, bool)
        value = float(value) if ok else value
    else:
        ok = isinstance(value, hint)
    if not ok:
        raise ConfigError(f"{path}: expected {hint.__name__}, got {_show(value)}")
    if "choices" in rules and value not in rules["choices"]:
        allowed = ", ".join(str(c) for c in rules["choices"])
        close = difflib.get_close_matches(value, rules["choices"], n=1, cutoff=0.6) if isinstance(value, str) else []
        hint = f" (did you mean '{close[0]}'?)" if close else ""
        raise ConfigError(f"{path}: {value!r} is not one of: {allowed}{hint}")
    if "min" in rules and value < rules["min"]:
        raise ConfigError(f"{path}: {value!r} is below the minimum {rules['min']}")
    if "max" in rules and value > rules["max"]:
        raise ConfigError(f"{path}: {value!r} is above the maximum {rules['max']}")
    return value


def _check_model(m: ModelConfig) -> None:
    n = len(m.widths)
    if n == 0:
        raise ConfigError("model.widths: expected at least one stage, got []")
    for key in ("blocks", "strides", "dilations"):
        v = getattr(m, key)
        if v is not None and len(v) != n:
            raise ConfigError(f"model.{key}: has {len(v)} entries, expected {n} (one per entry of model.widths)")
    if m.norm == "group":
        for i, w in enumerate(m.widths):
            if w % min(m.groups, w):
                raise ConfigError(
                    f"model.widths[{i}]: {w} is not divisible by model.groups={m.groups} (needed by norm = 'group')"
                )
    out = m.stage_output_strides()
    if out[-1] > m.min_size:
        key = f"model.strides: {m.strides}" if m.strides is not None else f"model.widths: {n} stages"
        raise ConfigError(
            f"{key} down-sample by {out[-1]}, more than model.min_size={m.min_size} allows; "
            f"use fewer or smaller strides, or raise model.min_size to at least {out[-1]}"
        )
    if m.fusion == "none" and m.skips:
        raise ConfigError(f"model.skips: {m.skips} given but model.fusion is 'none'; use 'sum' or 'concat'")
    if m.fusion != "none":
        have = sorted({s for s in out if s < out[-1]})
        if m.skips == [] and have:
            allowed = ", ".join(str(x) for x in have)
            raise ConfigError(f"model.skips: [] is empty but model.fusion is '{m.fusion}'; give one or more of: "
                              f"{allowed} (or leave skips out for the default)")
        for s in m.skips or []:
            if s not in have:
                allowed = ", ".join(str(x) for x in have) or "none (only one stride)"
                raise ConfigError(f"model.skips: stride {s} is not an encoder stride shallower than {out[-1]}; "
                                  f"allowed: {allowed}")
        if not m.skip_strides():
            raise ConfigError(f"model.fusion: '{m.fusion}' needs a skip, but the encoder has a single stride")


def _check_train(t: TrainConfig) -> None:
    if len(t.scale) != 2 or t.scale[0] > t.scale[1]:
        raise ConfigError(f"train.scale: {t.scale} must be two numbers [low, high] with low <= high")
