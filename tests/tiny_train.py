"""A tiny training set-up shared by the training tests: 4 bands (R, G, B, NIR), the 5 scene classes, two
stages, so a run takes seconds."""

import json

TINY = {
    "model": {"bands": 4, "num_classes": 5, "widths": [8, 16], "blocks": [1, 1], "head": [16], "fusion": "sum",
              "min_size": 16},
    "train": {"epochs": 2, "batch": 4, "patch": 32, "patches_per_epoch": 16, "lr": 5e-3, "warmup": 1,
              "val_fraction": 0.34, "threads": 1, "class_weights": "median", "dice": 0.5},
}


def tiny(model=None, train=None) -> dict:
    """TINY with some keys of each table changed."""
    return {"model": {**TINY["model"], **(model or {})}, "train": {**TINY["train"], **(train or {})}}


def write_toml(path, table: dict) -> None:
    """Write a two-level table as TOML (JSON scalars and arrays are valid TOML values)."""
    lines = []
    for name, section in table.items():
        lines += [f"[{name}]"] + [f"{k} = {json.dumps(v)}" for k, v in section.items()] + [""]
    path.write_text("\n".join(lines))


def fit(cfg, data, run, *, init=None, **options):
    """Train as ``fcnkit train`` does (the config's net, or the model file ``init`` with the config's [train]
    settings) and return the run's result."""
    from fcnkit import Model
    from fcnkit.config import Config, config_from_dict, config_to_dict

    cfg = cfg if isinstance(cfg, Config) else config_from_dict(cfg)
    model = Model.build(cfg) if init is None else Model.load(init)
    return model.fit(data, out_dir=run, **config_to_dict(cfg)["train"], **options).last_run
