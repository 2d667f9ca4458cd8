"""One spelling per concept: every subcommand's help, and the files a run writes, use the shared vocabulary
of docs/cli.md ("Conventions")."""

from __future__ import annotations

import argparse
import csv
import json
import re
import subprocess
import sys
from pathlib import Path

import pytest

from fcnkit.cli import _List, build_parser, main

ROOT = Path(__file__).resolve().parent.parent

# Spellings the project chose against (each beside the one it uses); none may appear in help or file keys.
RETIRED = {
    r"\bmIoU\b|\bmiou\b": "mean IoU / mean_iou",
    r"\bfraction\b": "share",
    r"\bpx_s\b|\bMP/s\b": "px/s with an SI prefix",
    r"\bOUT_DIR\b|--save\b|--csv\b": "--out",
    r"\bval_acc\b|\bmean_acc\b": "mean_accuracy",
}
WRITERS = {"export", "train", "evaluate", "segment", "demo", "convert", "scenes", "sample", "assess"}


def _commands() -> dict[str, argparse.ArgumentParser]:
    sub = next(a for a in build_parser()._actions if isinstance(a, argparse._SubParsersAction))
    return dict(sub.choices)


def _options(parser: argparse.ArgumentParser) -> dict[str, argparse.Action]:
    return {a.option_strings[-1]: a for a in parser._actions if a.option_strings and a.help != argparse.SUPPRESS}


def _retired_in(text: str) -> list[str]:
    return [f"{m.group(0)!r} (say {said})" for pattern, said in RETIRED.items() for m in re.finditer(pattern, text)]


def test_every_help_uses_one_spelling_per_concept() -> None:
    commands = _commands()
    assert set(commands) >= WRITERS | {"describe", "check"}
    max_pixels = set()
    for name, parser in commands.items():
        text = parser.format_help()
        assert not _retired_in(text), (name, _retired_in(text))
        options = _options(parser)
        if name in WRITERS:
            assert "--out" in options, f"{name}: results go to --out"
        if "--json" in options:  # a print flag everywhere, never a file name
            assert options["--json"].nargs in (0, "?") and options["--json"].metavar in (None, ""), name
        if "--max-pixels" in options:
            max_pixels.add(options["--max-pixels"].default)
        for opt, action in options.items():
            if action.nargs in ("+", "*"):  # lists are comma lists (the older space form read with a note)
                assert isinstance(action, _List), f"{name} {opt}: a list option must take commas"
            shown = action.default not in (None, False, [], argparse.SUPPRESS)
            if shown and not isinstance(action, (argparse._HelpAction, argparse._VersionAction)):
                said = parser._get_formatter()._get_help_string(action) or ""  # the text --help prints
                assert "default" in said, f"{name} {opt}: help must state the default"
    assert max_pixels == {2**31}  # one default in every command


@pytest.mark.parametrize("argv, note", [
    (["convert", "mobilenet_v3_small", "--native", "32", "--random-weights", "--sizes", "40", "48"],
     "--sizes: lists are written with commas (--sizes 40,48); read as such"),
    (["convert", "mobilenet_v3_small", "--native", "32", "--random-weights", "--keep", "0,1",
      "--save", "{tmp}/m.safetensors"],
     "--save is now spelled --out; read as such"),
])
def test_older_spellings_still_work_with_one_note(argv: list[str], note: str, tmp_path: Path,
                                                   capsys: pytest.CaptureFixture[str]) -> None:
    assert main([a.replace("{tmp}", str(tmp_path)) for a in argv]) == 0
    err = capsys.readouterr().err
    assert f"fcnkit: note: {note}" in err.splitlines()


def test_scenes_positional_folder_is_read_with_a_note(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    assert main(["scenes", str(tmp_path / "s"), "--count", "1", "--size", "32"]) == 0
    err = capsys.readouterr().err
    assert "fcnkit: note: the output folder is now given as --out DIR; read as such" in err
    assert (tmp_path / "s" / "classes.toml").is_file()


def _keys(value: object) -> set[str]:
    if isinstance(value, dict):
        return set(map(str, value)) | {k for v in value.values() for k in _keys(v)}
    if isinstance(value, list):
        return {k for v in value for k in _keys(v)}
    return set()


@pytest.fixture(scope="module")
def job(tmp_path_factory: pytest.TempPathFactory) -> dict:
    """A whole tiny job through the CLI (scenes, train, evaluate, segment, export, sample, assess): its folder
    and the command lines that wrote each result."""
    from tests.tiny_train import tiny, write_toml

    tmp = tmp_path_factory.mktemp("job")
    write_toml(tmp / "tiny.toml", tiny(train={"epochs": 1}))
    data, run, maps = tmp / "data", tmp / "run", tmp / "maps"
    assert main(["scenes", "--out", str(data), "--count", "3", "--size", "48", "--seed", "3"]) == 0
    assert main(["train", str(tmp / "tiny.toml"), "--data", str(data), "--out", str(run), "--quiet"]) == 0
    model = str(run / "model.safetensors")
    image = sorted((data / "images").iterdir())[0]
    commands = {
        "evaluate": ["evaluate", model, "--data", str(data), "--out", str(tmp / "e.json"), "--quiet"],
        "segment": ["segment", model, str(image), "--out", str(maps), "--quiet"],
        "export": ["export", model, "--out", str(tmp / "m.onnx")],
    }
    for argv in commands.values():
        assert main(argv) == 0, argv
    labels = next(maps.glob("*.labels.*"))
    commands["sample"] = ["sample", str(labels), "--out", str(tmp / "s.csv"), "--points", "30", "--min-per-class",
                          "2", "--classes", str(data / "classes.toml")]
    assert main(commands["sample"]) == 0
    rows = list(csv.DictReader(open(tmp / "s.csv", newline="")))
    for r in rows:
        r["reference"] = r["map_class"]
    with open(tmp / "filled.csv", "w", newline="") as f:
        w = csv.DictWriter(f, list(rows[0]))
        w.writeheader()
        w.writerows(rows)
    commands["assess"] = ["assess", str(tmp / "filled.csv"), "--labels", str(labels), "--classes",
                          str(data / "classes.toml"), "--pixel-size", "0.5",
                          "--out", f"{tmp / 'a.json'},{tmp / 'a.csv'}"]
    assert main(commands["assess"]) == 0
    return {"tmp": tmp, "run": run, "maps": maps, "commands": commands, "sample_row": rows[0]}


def test_written_files_use_the_shared_vocabulary(job: dict) -> None:
    """Every column and key the job wrote is in the vocabulary, and a concept is spelled alike in every file."""
    tmp, run, maps = job["tmp"], job["run"], job["maps"]
    metrics = next(csv.reader(open(run / "metrics.csv", newline="")))
    evaluation = json.loads((tmp / "e.json").read_text())
    areas_csv = next(csv.reader(open(next(maps.glob("*.areas.csv")), newline="")))
    areas_json = json.loads(next(maps.glob("*.areas.json")).read_text())
    assessment_csv = next(csv.reader(open(tmp / "a.csv", newline="")))
    written = {"metrics.csv": set(metrics), "evaluation": _keys(evaluation), "areas.csv": set(areas_csv),
               "areas.json": _keys(areas_json), "assessment.json": _keys(json.loads((tmp / "a.json").read_text())),
               "assessment.csv": set(assessment_csv), "sample.csv": set(job["sample_row"])}
    for name, keys in written.items():
        bad = _retired_in(" ".join(sorted(keys)))
        assert not bad, (name, bad)
    # the same concept, the same words: validation columns are the evaluation's score keys prefixed val_
    scores = set(evaluation["scores"])
    for key in ("pixel_accuracy", "mean_accuracy", "mean_iou", "fw_iou"):
        assert key in scores and f"val_{key}" in metrics
    assert {"recall", "precision", "iou", "dice"} <= scores
    assert "pixels_per_second" in metrics
    assert "share" in areas_csv and "share" in _keys(areas_json)


def test_one_overwrite_rule(job: dict, capsys: pytest.CaptureFixture[str]) -> None:
    """Every command that writes refuses to replace an earlier result, in one line and touching nothing,
    unless --overwrite is given; then it replaces it."""
    capsys.readouterr()
    for name, argv in job["commands"].items():
        before = {p: p.stat().st_mtime_ns for p in job["tmp"].rglob("*") if p.is_file()}
        assert main(argv) == 2, name
        err = capsys.readouterr().err
        assert len(err.strip().splitlines()) == 1 and "--overwrite" in err and "exists" in err, (name, err)
        assert {p: p.stat().st_mtime_ns for p in job["tmp"].rglob("*") if p.is_file()} == before, name
        assert main([*argv, "--overwrite"]) == 0, name
        capsys.readouterr()


def test_readme_figures_come_from_a_demo_run() -> None:
    """The README's demo figures are exactly what scripts/readme_figures.py renders from the committed
    figures.json of a full demo run (regenerate both with that script)."""
    res = subprocess.run([sys.executable, str(ROOT / "scripts" / "readme_figures.py"), "--check"],
                         capture_output=True, text=True, timeout=60)
    assert res.returncode == 0, res.stdout + res.stderr
