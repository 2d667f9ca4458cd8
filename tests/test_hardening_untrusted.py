"""Untrusted files: model-shaped files carrying a pickle payload are refused without running it, and no code
path in the package can unpickle or evaluate user data (checked on the syntax tree of every module).

The payload's ``__reduce__`` runs ``touch MARKER`` when unpickled; a control test shows it really does, so
its absence after each refusal is evidence that nothing was unpickled."""

from __future__ import annotations

import ast
import pickle
import shutil
from pathlib import Path

import pytest
import torch
from bad_inputs import CLASSES_TOML, ROOT, Payload, pickle_payload, run_cli, torch_zip_payload, write_dataset

from fcnkit import runstate
from fcnkit.convert.sources import from_torchscript, load_state_dict
from fcnkit.errors import FcnkitError
from fcnkit.model import Model

PACKAGE = ROOT / "fcnkit"
MAKERS = {"raw pickle": pickle_payload, "torch.save zip": torch_zip_payload}


def test_control_the_payload_runs_when_unpickled(tmp_path):
    """Without this, a missing marker would prove nothing."""
    marker = tmp_path / "MARKER"
    pickle.loads(pickle.dumps(Payload(marker)))
    assert marker.exists()
    marker.unlink()
    torch.load(torch_zip_payload(tmp_path / "evil.pt", marker), weights_only=False)  # what an unsafe loader does
    assert marker.exists()


@pytest.mark.parametrize("kind", MAKERS)
@pytest.mark.parametrize("name", ["model.safetensors", "weights.pt", "weights.pth", "net.pt", "resume.pt"])
def test_every_loader_refuses_a_payload_without_running_it(tmp_path, kind, name):
    marker = tmp_path / "MARKER"
    path = MAKERS[kind](tmp_path / name, marker)
    loaders = [Model.load, load_state_dict, from_torchscript,
               lambda p: runstate.load_resume(p, {"model": {}, "train": {}}, "")]
    for load in loaders:
        with pytest.raises(FcnkitError, match=name):
            load(path)
        assert not marker.exists(), f"{getattr(load, '__name__', load)} ran the payload"


@pytest.mark.parametrize("kind", MAKERS)
def test_the_cli_refuses_payloads_everywhere_a_model_file_goes_in(tmp_path, kind):
    marker = tmp_path / "MARKER"
    data = write_dataset(tmp_path / "data")
    (data / "classes.toml").write_text(CLASSES_TOML)
    evil_model = MAKERS[kind](tmp_path / "evil.safetensors", marker)
    evil_pt = MAKERS[kind](tmp_path / "evil.pt", marker)
    run = tmp_path / "run"
    run.mkdir()
    shutil.copy(evil_pt, run / "resume.pt")
    config = tmp_path / "c.toml"
    config.write_text("[model]\nnum_classes = 3\nwidths = [4]\nmin_size = 1\n")
    commands = [
        ["evaluate", evil_model, "--data", data, "--out", tmp_path / "e.json", "--quiet"],
        ["segment", evil_model, data / "images" / "s0.png", "--out", tmp_path / "out", "--quiet"],
        ["export", evil_model, "--out", tmp_path / "m.onnx"],
        ["train", config, "--data", data, "--out", tmp_path / "run2", "--init", evil_model, "--quiet"],
        ["train", config, "--data", data, "--out", run, "--resume", "--quiet"],
        ["convert", "resnet18", "--native", 64, "--weights", evil_pt],
        ["convert", evil_pt, "--native", 32],
    ]
    for argv in commands:
        code, _, err = run_cli(argv)
        assert code == 2 and len(err.strip().splitlines()) == 1 and "Traceback" not in err, (argv, err)
        assert not marker.exists(), f"fcnkit {argv[0]} ran the payload"


# --- the package cannot unpickle or evaluate: a check on the syntax tree of every module ---------------------------

FORBIDDEN_MODULES = {"pickle", "cPickle", "_pickle", "dill", "cloudpickle", "marshal", "shelve", "joblib", "builtins"}
FORBIDDEN_CALLS = {"eval", "exec", "compile", "__import__"}
# torch.jit.load reads TorchScript (a restricted language with its own loader, not pickle of Python objects):
# allowed where the user names the file as a classifier to convert, and where export checks its own output.
JIT_LOAD_ALLOWED = {"fcnkit/convert/sources.py", "fcnkit/export.py"}
# importlib: for `package.module:factory` typed on the command line (convert; model files cannot name code:
# grow.classifier_from_source refuses factory sources, see test below) and for the lazy public API, whose module
# names come from a fixed table in fcnkit/__init__.py.
IMPORTLIB_ALLOWED = {"fcnkit/convert/sources.py", "fcnkit/__init__.py"}


def _dotted(node: ast.AST) -> str:
    parts = []
    while isinstance(node, ast.Attribute):
        parts.append(node.attr)
        node = node.value
    if isinstance(node, ast.Name):
        parts.append(node.id)
    return ".".join(reversed(parts))


def _problems(path: Path) -> list[str]:
    rel = path.relative_to(ROOT).as_posix()
    tree = ast.parse(path.read_text(encoding="utf-8"), filename=rel)
    found = []
    for node in ast.walk(tree):
        where = f"{rel}:{getattr(node, 'lineno', '?')}"
        if isinstance(node, ast.Import):
            for alias in node.names:
                if alias.name.split(".")[0] in FORBIDDEN_MODULES:
                    found.append(f"{where}: import {alias.name}")
                if alias.name == "importlib" and rel not in IMPORTLIB_ALLOWED:
                    found.append(f"{where}: import importlib")
        elif isinstance(node, ast.ImportFrom):
            module = node.module or ""
            if module.split(".")[0] in FORBIDDEN_MODULES:
                found.append(f"{where}: from {module} import ...")
            if module.startswith("torch") and any(a.name == "load" for a in node.names):
                found.append(f"{where}: from {module} import load (call torch.load with weights_only=True)")
            if module.startswith("numpy") and any(a.name == "load" for a in node.names):
                found.append(f"{where}: from {module} import load")
        elif isinstance(node, ast.Call):
            name = _dotted(node.func)
            kw = {k.arg: k.value for k in node.keywords}
            if isinstance(node.func, ast.Name) and node.func.id in FORBIDDEN_CALLS:
                found.append(f"{where}: {node.func.id}()")
            if name in ("torch.load", "torch.serialization.load"):
                wo = kw.get("weights_only")
                if not (isinstance(wo, ast.Constant) and wo.value is True):
                    found.append(f"{where}: {name} without weights_only=True")
            if name in ("np.load", "numpy.load"):
                ap = kw.get("allow_pickle")
                if ap is not None and not (isinstance(ap, ast.Constant) and ap.value is False):
                    found.append(f"{where}: {name} with allow_pickle")
            if name == "torch.jit.load" and rel not in JIT_LOAD_ALLOWED:
                found.append(f"{where}: torch.jit.load")
            if name.split(".")[-1] in ("read_pickle", "loads") and name.split(".")[0] in ("pd", "pandas", "pickle"):
                found.append(f"{where}: {name}")
    return found


def test_the_checker_catches_what_it_looks_for(tmp_path, monkeypatch):
    """The scan itself can fail: feed it a module doing each forbidden thing."""
    bad = ROOT / "fcnkit" / "_hardening_probe.py"
    text = ("import pickle\nfrom torch import load\nimport torch\nimport numpy as np\n"
            "torch.load('x')\ntorch.load('x', weights_only=False)\neval('1')\nexec('1')\n"
            "np.load('x', allow_pickle=True)\ntorch.jit.load('x')\nimport importlib\nflag = True\n"
            "torch.load('x', weights_only=flag)\n")
    try:
        bad.write_text(text)
        found = _problems(bad)
    finally:
        bad.unlink()
    assert len(found) == 10, found


def test_no_code_path_unpickles_or_evaluates():
    files = sorted(PACKAGE.rglob("*.py"))
    assert len(files) > 20
    problems = [p for f in files for p in _problems(f)]
    assert not problems, "\n".join(problems)
    loads = [f for f in files if "torch.load(" in f.read_text()]
    assert loads, "expected at least one torch.load (resume points, torch weight files) to check"


def test_a_model_file_cannot_name_code_to_import(tmp_path):
    """A converted model file whose metadata names a user factory is refused, and nothing is imported."""
    import sys

    from fcnkit.convert.grow import classifier_from_source

    with pytest.raises(FcnkitError, match="user factory"):
        classifier_from_source({"source": "factory", "factory": "hardening_never_imported:make"}, "m.safetensors")
    assert "hardening_never_imported" not in sys.modules
