"""The README's Python quick start runs as written (in a fresh folder): a notebook trains from arrays and
predicts an array."""

import os
import re
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]


def _quick_start() -> str:
    readme = (ROOT / "README.md").read_text(encoding="utf-8")
    section = readme.split("## Python:", 1)[1]
    return re.search(r"```python\n(.*?)```", section, re.S).group(1)


def test_readme_python_quick_start_runs(tmp_path, monkeypatch, capsys):
    code = _quick_start()
    assert len(code.strip().splitlines()) <= 10  # "ten lines" (issue 13)
    monkeypatch.chdir(tmp_path)
    monkeypatch.setenv("OMP_NUM_THREADS", os.environ.get("OMP_NUM_THREADS", "1"))
    exec(compile(code, "README.md", "exec"), {"__name__": "readme"})  # noqa: S102 - the project's own README
    accuracy = float(capsys.readouterr().out.rsplit(":", 1)[1])
    assert 0.0 <= accuracy <= 1.0 and (tmp_path / "kessmoor.safetensors").is_file()
    pytest.importorskip("fcnkit").Model.load(tmp_path / "kessmoor.safetensors")
