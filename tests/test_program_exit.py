"""The ``fcnkit`` program's exit (fcnkit.cli.run): what it prints is all there, its exit status is main()'s, exit
handlers still run, and it waits for other threads it did not start, as a normal Python exit would."""

import subprocess
import sys

from fcnkit.cli import main


def _program(code: str, tmp_path) -> subprocess.CompletedProcess:
    return subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, cwd=tmp_path, timeout=120)


def test_output_and_status_are_those_of_main(tmp_path, capsys):
    assert main(["describe", "tiny"]) == 0
    expected = capsys.readouterr().out
    done = subprocess.run([sys.executable, "-m", "fcnkit", "describe", "tiny"], capture_output=True, text=True,
                          cwd=tmp_path, timeout=120)
    assert done.returncode == 0 and done.stdout == expected  # every byte flushed before the process ends
    bad = subprocess.run([sys.executable, "-m", "fcnkit", "describe", "missing.toml"], capture_output=True,
                         text=True, cwd=tmp_path, timeout=120)
    assert bad.returncode == 2 and bad.stdout == ""
    assert bad.stderr.count("\n") == 1 and "missing.toml" in bad.stderr and "Traceback" not in bad.stderr


def test_exit_handlers_still_run(tmp_path):
    done = _program("import atexit, pathlib, sys\n"
                    "from fcnkit.cli import run\n"
                    "atexit.register(lambda: pathlib.Path('handler-ran').write_text('yes'))\n"
                    "sys.argv = ['fcnkit', 'describe', 'tiny']\n"
                    "run()\n", tmp_path)
    assert done.returncode == 0 and (tmp_path / "handler-ran").read_text() == "yes"


def test_waits_for_other_threads_as_python_does(tmp_path):
    # A thread that is not a daemon keeps a Python process alive until it ends; the quick exit must not cut it.
    done = _program("import pathlib, sys, threading, time\n"
                    "from fcnkit.cli import run\n"
                    "def late():\n"
                    "    time.sleep(0.5)\n"
                    "    pathlib.Path('thread-done').write_text('yes')\n"
                    "threading.Thread(target=late).start()\n"
                    "sys.argv = ['fcnkit', 'describe', 'missing.toml']\n"
                    "run()\n", tmp_path)
    assert done.returncode == 2 and (tmp_path / "thread-done").read_text() == "yes"
