"""Config files: validation errors (one line naming key path, value and what is allowed), round trips,
and the command line's handling of bad input (exit status 2, one stderr line, no traceback)."""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import pytest

from fcnkit.config import Config, ModelConfig, config_from_dict, config_to_dict, load_config, replace_section
from fcnkit.errors import ConfigError, FcnkitError

ROOT = Path(__file__).resolve().parents[1]
CONFIGS = sorted((ROOT / "fcnkit" / "configs").glob("*.toml"))

# (TOML text, pieces the one-line message must contain: key path, bad value, what is allowed)
BAD = {
    "unknown section": ("[modle]\nbands = 3\n", ["modle", "unknown key", "did you mean 'model'", "model, train"]),
    "misspelt key": ("[model]\nwidht = [8]\n", ["model.widht", "unknown key", "did you mean 'widths'", "allowed:"]),
    "unknown key, no close match": ("[train]\nzzzz = 1\n", ["train.zzzz", "unknown key", "allowed: epochs"]),
    "nested unknown table": ("[model.extra]\na = 1\n", ["model.extra", "unknown key"]),
    "misspelt choice": ('[model]\nupsample = "transposd"\n',
                        ["model.upsample", "'transposd'", "transposed, bilinear", "did you mean 'transposed'"]),
    "bad choice": ('[model]\nupsample = "bicubic"\n',
                   ["model.upsample", "'bicubic'", "not one of: transposed, bilinear"]),
    "int choice": ("[model]\nkernel = 4\n", ["model.kernel", "4", "not one of: 1, 3, 5, 7"]),
    "string for int": ('[model]\nkernel = "3"\n', ["model.kernel", "'3'", "expected int"]),
    "bool for int": ("[model]\nbands = true\n", ["model.bands", "True", "expected int"]),
    "float for int": ("[model]\nbands = 3.5\n", ["model.bands", "3.5", "expected int"]),
    "scalar for list": ("[model]\nwidths = 16\n", ["model.widths", "16", "expected a list of int"]),
    "string in list": ('[model]\nfusion = "sum"\nskips = [2, "x"]\n', ["model.skips[1]", "'x'", "expected int"]),
    "string for float": ('[train]\nlr = "fast"\n', ["train.lr", "'fast'", "expected float"]),
    "string for bool": ('[train]\naugment = "yes"\n', ["train.augment", "'yes'", "expected bool"]),
    "scalar for section": ("model = 3\n", ["model", "3", "expected a table"]),
    "zero width": ("[model]\nwidths = [0, 8]\n", ["model.widths[0]", "0", "below the minimum 1"]),
    "negative width": ("[model]\nwidths = [8, -4]\n", ["model.widths[1]", "-4", "below the minimum 1"]),
    "no stages": ("[model]\nwidths = []\n", ["model.widths", "[]", "at least one stage"]),
    "huge width": ("[model]\nwidths = [8, 1000000000]\n", ["model.widths[1]", "1000000000", "above the maximum 4096"]),
    "zero blocks": ("[model]\nwidths = [8]\nblocks = [0]\n", ["model.blocks[0]", "0", "below the minimum 1"]),
    "too many classes": ("[model]\nnum_classes = 256\n", ["model.num_classes", "256", "above the maximum 255"]),
    "list length": ("[model]\nwidths = [8, 16]\nblocks = [1]\n", ["model.blocks", "1 entries", "expected 2"]),
    "skip stride absent": ('[model]\nwidths = [8, 8, 8, 8]\nfusion = "sum"\nskips = [3]\n',
                           ["model.skips", "stride 3", "allowed: 1, 2, 4"]),
    "skip at deepest stride": ('[model]\nwidths = [8, 8]\nfusion = "concat"\nskips = [2]\n',
                               ["model.skips", "stride 2", "allowed: 1"]),
    "empty skips": ('[model]\nwidths = [8, 8, 8]\nfusion = "sum"\nskips = []\n',
                    ["model.skips", "[]", "one or more of: 1, 2"]),
    "skips without fusion": ("[model]\nwidths = [8, 8]\nskips = [1]\n", ["model.skips", "[1]", "'sum' or 'concat'"]),
    "fusion with one stride": ('[model]\nwidths = [8]\nfusion = "sum"\n', ["model.fusion", "'sum'", "single stride"]),
    "too much down-sampling (default strides)": ("[model]\nwidths = [4, 4, 4, 4, 4, 4]\nmin_size = 16\n",
                                                 ["model.widths", "down-sample by 32", "min_size=16",
                                                  "at least 32"]),
    "too much down-sampling (strides)": ("[model]\nwidths = [4, 4]\nstrides = [4, 4]\nmin_size = 8\n",
                                         ["model.strides", "[4, 4]", "down-sample by 16", "min_size=8"]),
    "group norm divisibility": ('[model]\nwidths = [12]\nnorm = "group"\ngroups = 8\n',
                                ["model.widths[0]", "12", "model.groups=8"]),
    "scale order": ("[train]\nscale = [2.0, 1.0]\n", ["train.scale", "[2.0, 1.0]", "low <= high"]),
}


def _one_line_error(path: Path) -> str:
    with pytest.raises(ConfigError) as info:
        load_config(path)
    msg = str(info.value)
    assert "\n" not in msg, msg
    assert msg.startswith(f"{path}: "), msg  # the file is named first
    return msg


@pytest.mark.parametrize("case", sorted(BAD))
def test_bad_config_gives_one_line_naming_key_value_and_allowed(case: str, tmp_path: Path) -> None:
    text, pieces = BAD[case]
    path = tmp_path / "bad.toml"
    path.write_text(text, encoding="utf-8")
    msg = _one_line_error(path)
    for piece in pieces:
        assert piece in msg, (piece, msg)
    assert isinstance(ConfigError(msg), FcnkitError)


def test_not_toml_binary_directory_and_missing(tmp_path: Path) -> None:
    text = tmp_path / "notes.toml"
    text.write_text("this is not a config\n", encoding="utf-8")
    assert "not valid TOML" in _one_line_error(text)
    broken = tmp_path / "broken.toml"
    broken.write_text("[model]\nwidths = [8,\n", encoding="utf-8")
    assert "not valid TOML" in _one_line_error(broken)
    binary = tmp_path / "image.toml"
    binary.write_bytes(b"\x89PNG\r\n\x1a\n\xff\xfe\x00\x00")
    assert "not a text file" in _one_line_error(binary)
    assert "is a directory" in _one_line_error(tmp_path)
    assert "no such config file" in _one_line_error(tmp_path / "absent.toml")


def test_dict_errors_name_the_key_without_a_file() -> None:
    with pytest.raises(ConfigError, match=r"^config: expected a table, got list$"):
        config_from_dict([])  # type: ignore[arg-type]
    with pytest.raises(ConfigError, match=r"^model\.dropout: 1\.0 is above the maximum 0\.95$"):
        config_from_dict({"model": {"dropout": 1.0}})


def test_defaults_and_resolved_values() -> None:
    cfg = config_from_dict({})
    assert cfg == Config()
    m = ModelConfig(widths=[8, 16, 32], fusion="sum")
    assert m.stage_strides() == [1, 2, 2]
    assert m.stage_output_strides() == [1, 2, 4]
    assert m.skip_strides() == [2, 1]  # the two finest halvings, deepest first
    assert ModelConfig(widths=[8, 16, 32], fusion="concat").skip_strides() == [2, 1]
    assert ModelConfig(widths=[8, 16, 32], fusion="sum", skips=[1, 2, 1]).skip_strides() == [2, 1]
    # strides that are not powers of two still get a default skip (regression: there was none for 3 x 3)
    assert ModelConfig(widths=[4, 4], strides=[3, 3], fusion="sum").skip_strides() == [3]
    assert ModelConfig(widths=[4, 4, 4, 4], strides=[1, 4, 1, 2], fusion="sum").skip_strides() == [4, 1]


@pytest.mark.parametrize("path", CONFIGS, ids=lambda p: p.name)
def test_round_trip_dict_and_json(path: Path) -> None:
    cfg = load_config(path)
    table = config_to_dict(cfg)
    assert config_from_dict(table) == cfg
    assert config_from_dict(json.loads(json.dumps(table))) == cfg  # model-file metadata goes through JSON
    assert all(v is not None for section in table.values() for v in section.values())


def test_replace_section_revalidates() -> None:
    cfg = load_config(ROOT / "fcnkit" / "configs" / "tiny.toml")
    assert replace_section(cfg, "model", num_classes=7).model.num_classes == 7
    assert replace_section(cfg, "model", num_classes=7).model.widths == cfg.model.widths
    with pytest.raises(ConfigError, match=r"^model\.clases: unknown key \(did you mean 'num_classes'\?\)"):
        replace_section(cfg, "model", clases=7)
    with pytest.raises(ConfigError, match=r"^train\.epochs: 0 is below the minimum 1$"):
        replace_section(cfg, "train", epochs=0)
    with pytest.raises(ConfigError, match=r"^modl: unknown key \(did you mean 'model'\?\); allowed: model, train$"):
        replace_section(cfg, "modl", classes=7)


def test_docs_document_every_config_key() -> None:
    from fcnkit.config import TrainConfig

    config_doc = (ROOT / "docs" / "config.md").read_text(encoding="utf-8")
    for name in ModelConfig.__dataclass_fields__:
        assert f"`model.{name}`" in config_doc, name
    training_doc = (ROOT / "docs" / "training.md").read_text(encoding="utf-8")
    for name in TrainConfig.__dataclass_fields__:
        assert f"`{name}`" in training_doc, name


# --- the command line ------------------------------------------------------------------------------------


def _run(*args: str) -> subprocess.CompletedProcess[str]:
    return subprocess.run(args, capture_output=True, text=True, timeout=120, cwd=ROOT)


def test_cli_bad_config_exits_2_with_one_line(tmp_path: Path) -> None:
    bad = tmp_path / "BAD.toml"
    bad.write_text('[model]\nwidths = [8, 16]\nfusion = "sum"\nskips = [4]\n', encoding="utf-8")
    res = _run(sys.executable, "-m", "fcnkit", "describe", str(bad))
    assert res.returncode == 2
    assert res.stdout == ""
    lines = res.stderr.splitlines()
    assert len(lines) == 1, res.stderr
    assert "Traceback" not in res.stderr
    assert lines[0].startswith(f"fcnkit describe: error: {bad}: ")
    assert "model.skips" in lines[0] and "stride 4" in lines[0] and "allowed: 1" in lines[0]


def test_cli_usage_errors_exit_2(capsys: pytest.CaptureFixture[str]) -> None:
    from fcnkit.cli import main

    for argv in (["describe"], ["nosuchcommand"], []):
        with pytest.raises(SystemExit) as info:
            main(argv)
        assert info.value.code == 2
        err = capsys.readouterr().err
        assert len(err.splitlines()) == 1 and err.startswith("fcnkit"), err


def test_cli_prints_any_user_error_on_one_line(monkeypatch: pytest.MonkeyPatch,
                                               capsys: pytest.CaptureFixture[str]) -> None:
    import fcnkit.cli

    def fail(args: object) -> int:
        raise ConfigError("first line\nsecond line")

    monkeypatch.setattr(fcnkit.cli, "_describe", fail)
    assert fcnkit.cli.main(["describe", "x.toml"]) == 2
    assert capsys.readouterr().err == "fcnkit describe: error: first line second line\n"


def test_version(capsys: pytest.CaptureFixture[str]) -> None:
    # the console script itself is run by tests/test_describe.py on every shipped config
    from fcnkit import __version__
    from fcnkit.cli import main

    with pytest.raises(SystemExit) as info:
        main(["--version"])
    assert info.value.code == 0 and capsys.readouterr().out.strip() == f"fcnkit {__version__}"


def test_older_key_spelling_is_read_with_a_note(tmp_path: Path) -> None:
    """model.classes (a count, easily confused with the --classes table file) is now model.num_classes."""
    path = tmp_path / "old.toml"
    path.write_text("[model]\nclasses = 4\nwidths = [8]\n")
    notes: list[str] = []
    assert load_config(path, note=notes.append).model.num_classes == 4
    assert notes == [f"{path}: model.classes is now spelled model.num_classes; read as such"]
    assert config_from_dict({"model": {"classes": 4}}).model.num_classes == 4  # model files: silently
    with pytest.raises(ConfigError, match=r"model.classes: give only model.num_classes"):
        config_from_dict({"model": {"classes": 4, "num_classes": 4}})
