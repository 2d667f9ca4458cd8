"""The malformed-input battery (cases in tests/bad_inputs.py) against the CLI contract for bad input:
exit status 2, exactly one line on stderr naming the culprit and what was expected, no traceback, nothing new
under a final name in the output location, no hidden .partial file left behind and no earlier file changed."""

from __future__ import annotations

import os
import shutil
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
from bad_inputs import CASES, ROOT, Workspace, available_commands, run_case, run_cli, scene, slug, write_png

COMMANDS = available_commands()


@pytest.fixture(scope="module")
def ws(tmp_path_factory, torch_one_thread) -> Workspace:
    return Workspace(tmp_path_factory.mktemp("battery"))


def test_the_battery_is_broad():
    """At least 50 distinct bad inputs, spread over every subcommand the CLI has."""
    assert len({c.name for c in CASES}) >= 50
    assert len(CASES) >= 90
    untested = COMMANDS - {c.command for c in CASES}
    assert not untested, f"no bad-input case for: {sorted(untested)}"


@pytest.mark.parametrize("c", CASES, ids=[slug(f"{c.command} {c.name}") for c in CASES])
def test_bad_input_gives_one_line_and_exit_2(ws, c):
    if c.command not in COMMANDS:
        pytest.skip(f"`fcnkit {c.command}` is not in this build")
    o = run_case(c, ws)
    assert "Traceback" not in o.stderr, o.stderr
    assert o.code == 2, (o.code, o.stderr)
    if o.report:  # `check` lists every problem, each naming its file, on stdout; nothing on stderr
        assert o.lines and not o.stderr.strip(), (o.stdout, o.stderr)
        line = next((p for p in o.lines if all(w.lower() in p.lower() for w in c.expect)), o.lines[0])
    else:
        assert len(o.lines) == 1, o.stderr
        line = o.lines[0]
        assert line.startswith(("fcnkit: error:", f"fcnkit {c.command}: error:")), line
    for want in c.expect:
        assert want.lower() in line.lower(), f"{want!r} not in: {line}"
    assert not o.new_files, o.new_files
    assert not o.partials, o.partials
    assert not o.changed, o.changed
    markers = list((ws.root / "cases").rglob("MARKER"))
    assert not markers, f"a pickle payload ran: {markers}"


def test_the_bad_run_folder_is_left_as_it_was(ws):
    """A refused run leaves the earlier run's files byte for byte."""
    c = next(c for c in CASES if c.name == "run folder already holds a run")
    o = run_case(c, ws)
    assert o.code == 2
    run = ws.root / "cases" / slug(f"train-{c.name}") / "run"
    assert sorted(p.name for p in run.iterdir()) == ["metrics.csv"]
    assert (run / "metrics.csv").read_text() == "epoch,val_miou\n1,0.5\n"


# --- inputs that look odd but are valid: they must work -------------------------------------------------------

def test_a_one_pixel_image_is_accepted(ws, tmp_path):
    """A 1×1 image is valid input: the net pads it to a multiple of its factor and crops back."""
    data = Path(shutil.copytree(ws.data, tmp_path / "data"))
    write_png(data / "images" / "dot.png", scene(5)[0][:1, :1])
    write_png(data / "masks" / "dot.png", np.array([[1]], np.uint8))
    code, _, err = run_cli(["evaluate", ws.model, "--data", data, "--out", tmp_path / "s.json", "--quiet"])
    assert code == 0, err
    assert (tmp_path / "s.json").is_file()
    code, _, err = run_cli(["train", ws.config, "--data", data, "--out", tmp_path / "run", "--quiet"])
    assert code == 0, err
    assert (tmp_path / "run" / "model.safetensors").is_file()


# --- the real entry point behaves like the in-process runs -------------------------------------------------------

def test_python_dash_m_fcnkit_gives_the_same_line(ws):
    """One case through the real entry point (each start costs the interpreter and torch import)."""
    c = next(c for c in CASES if c.name == "model: random bytes" and c.command == "segment")
    name = c.name
    folder = ws.folder(f"subprocess-{name}")
    call = c.build(ws, folder)
    env = {**os.environ, "PYTHONPATH": str(ROOT)}
    p = subprocess.run([sys.executable, "-m", "fcnkit", *map(str, call.argv)], capture_output=True, text=True,
                       env=env, timeout=300)
    assert p.returncode == 2
    lines = p.stderr.splitlines()
    assert len(lines) == 1 and "Traceback" not in p.stderr, p.stderr
    assert all(want.lower() in lines[0].lower() for want in c.expect), lines[0]
