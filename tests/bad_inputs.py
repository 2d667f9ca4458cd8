"""The malformed-input battery: bad inputs for every fcnkit subcommand, run through the real CLI.

Shared by tests/test_hardening_inputs.py (which asserts the contract below for every case) and
scripts/battery_table.py (which prints the cases as a markdown table).

The contract for a bad input (DEVELOPERS.md, "Conventions"): exit status 2; exactly one line on stderr,
naming the file, key or value at fault and what was expected; no traceback; nothing new in the output
location — no file under a final name and no hidden ``.partial`` temp file left behind —; and no earlier file
changed, in the output location or among the workspace's good inputs.

Each case builds its bad input in a folder of its own, next to a small shared workspace holding one good
example of everything (dataset folder, config, model file). The CLI runs in-process (``fcnkit.cli.main``) with
file descriptors 1 and 2 redirected, so output written by C libraries is seen too, and without paying the
interpreter and torch start-up for every case; tests/test_hardening_inputs.py also runs a few cases through
``python -m fcnkit`` to show both paths behave alike.
"""

from __future__ import annotations

import contextlib
import io
import json
import math
import os
import re
import shutil
import struct
import sys
import tempfile
import traceback
import warnings
import zlib
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parent.parent

TINY_CONFIG = """\
[model]
bands = 3
num_classes = 3
widths = [4, 8]
blocks = [1, 1]
head = [8]
fusion = "sum"
min_size = 8

[train]
epochs = 1
batch = 2
patch = 16
patches_per_epoch = 4
val_fraction = 0.34
threads = 1
augment = false
"""

CLASSES_TOML = """\
ignore = 255

[[classes]]
id = 0
name = "ground"
color = "#806040"

[[classes]]
id = 1
name = "water"
color = "#2050c0"

[[classes]]
id = 2
name = "roof"
color = "#c03020"
"""

COLORS = np.array([(0x80, 0x60, 0x40), (0x20, 0x50, 0xC0), (0xC0, 0x30, 0x20)], np.uint8)


# --- the workspace: one good example of everything ----------------------------------------------------------


class Workspace:
    """Good inputs shared by every case (never modified by a case) and a fresh folder per case."""

    def __init__(self, root: Path) -> None:
        self.root = Path(root)
        self.root.mkdir(parents=True, exist_ok=True)
        self.config = self.root / "tiny.toml"
        self.config.write_text(TINY_CONFIG)
        self.data = self.root / "data"
        write_dataset(self.data)
        self.model = self.root / "model.safetensors"
        write_model(self.model, bands=3)
        self.model4 = self.root / "model4.safetensors"
        write_model(self.model4, bands=4)
        self.file = self.root / "a-regular-file"
        self.file.write_text("not a folder\n")

    def good_inputs(self) -> list[Path]:
        """The shared good inputs, which no case may change."""
        return [self.config, self.data, self.model, self.model4, self.file]

    def folder(self, name: str) -> Path:
        """A new empty folder for one case."""
        path = self.root / "cases" / slug(name)
        if path.exists():
            shutil.rmtree(path)
        path.mkdir(parents=True)
        return path

    def copy_data(self, folder: Path) -> Path:
        """A private copy of the good dataset inside ``folder``."""
        return Path(shutil.copytree(self.data, folder / "data"))

    def read_only(self, folder: Path) -> Path:
        """An existing folder in which this user cannot create files: a folder with mode 0o555, or, as root
        (whom modes do not stop), /sys when the kernel refuses files there; else :meth:`unwritable`."""
        if os.geteuid() != 0:
            path = folder / "read-only"
            path.mkdir()
            path.chmod(0o555)
            return path
        try:
            Path("/sys/.fcnkit-probe").touch()
        except OSError:
            return Path("/sys")
        Path("/sys/.fcnkit-probe").unlink()
        return self.unwritable(folder)

    def unwritable(self, folder: Path) -> Path:
        """A folder no file can be created in. chmod does not stop root, so as root the "folder" is a path
        below a regular file (every create there fails with ENOTDIR); otherwise a folder with mode 0o555."""
        if os.geteuid() == 0:
            return self.file / "out"
        path = folder / "read-only"
        path.mkdir()
        path.chmod(0o555)
        return path


def write_png(path: Path, array: np.ndarray) -> Path:
    from PIL import Image

    path.parent.mkdir(parents=True, exist_ok=True)
    Image.fromarray(array).save(path)
    return path


def scene(seed: int, size: int = 24) -> tuple[np.ndarray, np.ndarray]:
    """A small RGB image and its id mask (blocks of three colours with noise; some pixels unlabelled)."""
    rng = np.random.default_rng(seed)
    ids = np.repeat(np.repeat(rng.integers(0, 3, (size // 8 + 1, size // 8 + 1)), 8, 0), 8, 1)[:size, :size]
    image = np.clip(COLORS[ids].astype(np.int16) + rng.integers(-20, 21, (size, size, 3)), 0, 255).astype(np.uint8)
    mask = ids.astype(np.uint8)
    mask[rng.random((size, size)) < 0.1] = 255
    return image, mask


def write_dataset(folder: Path, count: int = 3, size: int = 24) -> Path:
    (folder / "images").mkdir(parents=True, exist_ok=True)
    (folder / "masks").mkdir(parents=True, exist_ok=True)
    (folder / "classes.toml").write_text(CLASSES_TOML)
    for i in range(count):
        image, mask = scene(i, size)
        write_png(folder / "images" / f"s{i}.png", image)
        write_png(folder / "masks" / f"s{i}.png", mask)
    return folder


def write_model(path: Path, bands: int = 3) -> Path:
    """A tiny fcnkit model file (random weights) with three classes."""
    import tomllib

    import torch

    from fcnkit.config import config_from_dict, config_to_dict
    from fcnkit.data.classes import ClassInfo, ClassTable
    from fcnkit.model import Model
    from fcnkit.nets import build_model

    table = tomllib.loads(TINY_CONFIG)
    table["model"]["bands"] = bands
    cfg = config_from_dict(table)
    classes = ClassTable(tuple(ClassInfo(i, n, tuple(int(v) for v in COLORS[i]))
                               for i, n in enumerate(("ground", "water", "roof"))))
    torch.manual_seed(0)
    Model(build_model(cfg), classes=classes, mean=[100.0] * bands, std=[50.0] * bands,
          config=config_to_dict(cfg)).save(path)
    return path


def write_safetensors(path: Path, tensors: dict, metadata: dict[str, str] | None) -> Path:
    from safetensors.torch import save_file

    save_file(tensors, str(path), metadata=metadata)
    return path


def model_tensors(path: Path) -> dict:
    from safetensors.torch import load_file

    return load_file(str(path))


def model_strings(path: Path) -> dict[str, str]:
    from safetensors import safe_open

    with safe_open(str(path), framework="pt") as f:
        return dict(f.metadata())


def rewrite_model(src: Path, dst: Path, *, tensors: Callable[[dict], dict] | None = None,
                  meta: Callable[[dict], dict] | None = None) -> Path:
    """A copy of model file ``src`` with its tensors and/or metadata strings changed."""
    t = model_tensors(src)
    m = model_strings(src)
    return write_safetensors(dst, tensors(t) if tensors else t, meta(m) if meta else m)


def truncate(path: Path, keep: float = 0.5) -> Path:
    data = path.read_bytes()
    path.write_bytes(data[: int(len(data) * keep)])
    return path


def garbage(path: Path, size: int = 512, head: bytes = b"") -> Path:
    path.parent.mkdir(parents=True, exist_ok=True)
    path.write_bytes(head + np.random.default_rng(len(str(path))).integers(0, 256, size, np.uint8).tobytes())
    return path


def write_tiff(path: Path, array: np.ndarray, **kwargs: object) -> Path:
    import tifffile

    path.parent.mkdir(parents=True, exist_ok=True)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # tifffile warns about the deliberately odd shapes
        tifffile.imwrite(path, array, **kwargs)
    return path


def png_chunk(kind: bytes, data: bytes) -> bytes:
    """One PNG chunk: length, type, data, CRC-32 over type and data (PNG specification, section 5.3)."""
    return struct.pack(">I", len(data)) + kind + data + struct.pack(">I", zlib.crc32(kind + data) & 0xFFFFFFFF)


def png_bomb_header(path: Path, width: int, height: int) -> Path:
    """A PNG whose header claims width × height 8-bit grey pixels, followed by almost no data."""
    ihdr = struct.pack(">IIBBBBB", width, height, 8, 0, 0, 0, 0)
    idat = zlib.compress(b"\x00" * 64)
    data = b"\x89PNG\r\n\x1a\n" + png_chunk(b"IHDR", ihdr) + png_chunk(b"IDAT", idat) + png_chunk(b"IEND", b"")
    path.parent.mkdir(parents=True, exist_ok=True)
    path.write_bytes(data)
    return path


class Payload:
    """A pickle whose unpickling creates ``marker``: proof of whether a loader executed it."""

    def __init__(self, marker: Path) -> None:
        self.marker = str(marker)

    def __reduce__(self):
        return (os.system, (f"touch {self.marker}",))


def pickle_payload(path: Path, marker: Path) -> Path:
    """Write a pickle payload (the shape of an old-style torch checkpoint) to ``path``."""
    import pickle  # test-only: the payload a malicious model file would carry

    path.parent.mkdir(parents=True, exist_ok=True)
    path.write_bytes(pickle.dumps({"state_dict": Payload(marker)}))
    return path


def torch_zip_payload(path: Path, marker: Path) -> Path:
    """A torch.save zip file whose pickled object carries the payload (what a malicious .pt/.pth looks like)."""
    import torch

    path.parent.mkdir(parents=True, exist_ok=True)
    torch.save({"weight": torch.zeros(1), "evil": Payload(marker)}, path)
    return path


# --- running the CLI --------------------------------------------------------------------------------------------


@dataclass
class Outcome:
    code: int | None
    stdout: str
    stderr: str
    new_files: list[str] = field(default_factory=list)
    partials: list[str] = field(default_factory=list)
    changed: list[str] = field(default_factory=list)  # files that existed before and differ (or are gone) after
    report: bool = False  # the command's job is a report of problems (``check``): they are on stdout

    @property
    def lines(self) -> list[str]:
        """The error message: stderr's lines, or the problem lines of a ``check`` report."""
        if not self.report:
            return [line for line in self.stderr.splitlines() if line.strip()]
        lines = self.stdout.splitlines()
        start = next((i + 1 for i, line in enumerate(lines) if line.startswith("problems (")), len(lines))
        return [line.strip() for line in lines[start:] if line.startswith("  ")]


def run_cli(argv: list, env: dict[str, str] | None = None,
            fsize: int | None = None) -> tuple[int | None, str, str]:
    """Run ``fcnkit argv`` in this process; (exit status, stdout, stderr) as the terminal would show them.
    ``fsize``: a file size limit in bytes for the run (RLIMIT_FSIZE, SIGXFSZ ignored), so writes beyond it fail
    with EFBIG as they would on a full disk.

    An exception escaping ``main`` is what the interpreter would print: a traceback, status 1."""
    with _environment(env or {}), _file_size_limit(fsize):
        return _run_cli([str(a) for a in argv])


@contextlib.contextmanager
def _file_size_limit(fsize: int | None):
    if fsize is None:
        yield
        return
    import resource
    import signal

    old = resource.getrlimit(resource.RLIMIT_FSIZE)
    handler = signal.signal(signal.SIGXFSZ, signal.SIG_IGN)
    resource.setrlimit(resource.RLIMIT_FSIZE, (fsize, old[1]))
    try:
        yield
    finally:
        resource.setrlimit(resource.RLIMIT_FSIZE, old)
        signal.signal(signal.SIGXFSZ, handler)


@contextlib.contextmanager
def _environment(env: dict[str, str]):
    saved = {k: os.environ.get(k) for k in env}
    os.environ.update(env)
    try:
        yield
    finally:
        for k, v in saved.items():
            if v is None:
                os.environ.pop(k, None)
            else:
                os.environ[k] = v


def _run_cli(argv: list[str]) -> tuple[int | None, str, str]:
    from fcnkit.cli import main

    with tempfile.TemporaryFile() as fd_out, tempfile.TemporaryFile() as fd_err:
        sys.stdout.flush()
        sys.stderr.flush()
        saved = os.dup(1), os.dup(2)
        out, err = io.StringIO(), io.StringIO()
        os.dup2(fd_out.fileno(), 1)
        os.dup2(fd_err.fileno(), 2)
        try:
            with contextlib.redirect_stdout(out), contextlib.redirect_stderr(err), warnings.catch_warnings():
                warnings.simplefilter("default")
                warnings.showwarning = _show_warning  # as the interpreter would (pytest records them instead)
                try:
                    code: int | None = main(argv)
                except SystemExit as e:  # argparse
                    code = e.code if isinstance(e.code, int) else (0 if e.code is None else 1)
                except BaseException:  # noqa: BLE001 - what would reach the user as a traceback
                    err.write(traceback.format_exc())
                    code = 1
        finally:
            os.dup2(saved[0], 1)
            os.dup2(saved[1], 2)
            os.close(saved[0])
            os.close(saved[1])
        fd_out.seek(0)
        fd_err.seek(0)
        return code, out.getvalue() + fd_out.read().decode(errors="replace"), \
            err.getvalue() + fd_err.read().decode(errors="replace")


def _show_warning(message, category, filename, lineno, file=None, line=None) -> None:
    sys.stderr.write(warnings.formatwarning(message, category, filename, lineno, line))


def snapshot(folders: list[Path]) -> dict[str, bytes]:
    """The contents of every file below ``folders`` (hashed), by path."""
    import hashlib

    return {p: hashlib.sha256(Path(p).read_bytes()).digest() for p in listing(folders) if Path(p).is_file()}


def listing(folders: list[Path]) -> set[str]:
    """Every file (not folder) below ``folders``, as paths."""
    found = set()
    for folder in folders:
        if folder.is_file():
            found.add(str(folder))
        elif folder.is_dir():
            found.update(str(p) for p in folder.rglob("*") if not p.is_dir())
    return found


# --- the cases ----------------------------------------------------------------------------------------------


@dataclass
class Call:
    """The command line of a case and the output locations to watch."""

    argv: list
    watch: list[Path]
    env: dict[str, str] = field(default_factory=dict)  # environment variables set for the run
    fsize: int | None = None  # a file size limit for the run (a full disk, as writes see it)


@dataclass(frozen=True)
class Case:
    name: str  # the bad input, as the table shows it
    command: str
    build: Callable[[Workspace, Path], Call]
    expect: tuple[str, ...]  # the message must contain each (case-insensitive): the culprit and what was expected


CASES: list[Case] = []


def case(name: str, command: str, *expect: str) -> Callable[[Callable[[Workspace, Path], Call]], None]:
    def register(build: Callable[[Workspace, Path], Call]) -> None:
        assert all((c.name, c.command) != (name, command) for c in CASES), name
        CASES.append(Case(name, command, build, expect))
    return register


def slug(text: str) -> str:
    return re.sub(r"[^a-z0-9]+", "-", text.lower()).strip("-")[:60]


def run_case(c: Case, ws: Workspace) -> Outcome:
    folder = ws.folder(f"{c.command}-{c.name}")
    call = c.build(ws, folder)
    before = listing(call.watch)
    contents = snapshot([*call.watch, *ws.good_inputs()])
    code, out, err = run_cli(call.argv, call.env, call.fsize)
    after = listing(call.watch)
    new = sorted(after - before)
    now = snapshot([*call.watch, *ws.good_inputs()])
    changed = sorted(p for p, digest in contents.items() if now.get(p) != digest)
    return Outcome(code, out, err, [p for p in new if not Path(p).name.startswith(".")],
                   [p for p in after if ".partial" in Path(p).name], changed, report=c.command == "check")


def available_commands() -> set[str]:
    from fcnkit.cli import build_parser

    parser = build_parser()
    sub = next(a for a in parser._actions if a.dest == "command")
    return set(sub.choices)


# Each builder gets the workspace and its own folder; it writes the bad input there and returns the command.
# Helpers for the common shapes:

def _describe(path: Path) -> Call:
    return Call(["describe", path], [])


def _config_case(name: str, text: str | bytes, *expect: str) -> None:
    def build(ws: Workspace, folder: Path) -> Call:
        path = folder / "bad.toml"
        path.write_bytes(text if isinstance(text, bytes) else text.encode())
        return _describe(path)
    case(name, "describe", *expect)(build)


def tiny_config(model: str = "", train: str = "") -> str:
    """The tiny config with lines replaced/added in its [model] or [train] table."""
    text = TINY_CONFIG
    for section, extra in (("[model]", model), ("[train]", train)):
        for line in filter(None, extra.splitlines()):
            key = line.split("=")[0].strip()
            text = re.sub(rf"(?m)^{re.escape(key)} = .*\n", "", text) if key in text else text
            text = text.replace(section + "\n", f"{section}\n{line}\n")
    return text


_config_case("config: random bytes (not UTF-8)", bytes(range(128, 256)) * 4, "bad.toml", "expected a TOML")
_config_case("config: TOML syntax error", "[model]\nwidths = [8, 16\n", "bad.toml", "not valid TOML")
_config_case("config: misspelt key model.widht", tiny_config("widht = [8]"), "model.widht", "did you mean 'widths'")
_config_case("config: unknown section [optim]", TINY_CONFIG + "[optim]\nlr = 1\n", "optim", "allowed: model, train")
_config_case("config: string where a list is expected", tiny_config("widths = 'wide'"), "model.widths",
             "expected a list")
_config_case("config: float where an integer is expected", tiny_config("bands = 2.5"), "model.bands",
             "expected int")
_config_case("config: true where an integer is expected", tiny_config("bands = true"), "model.bands",
             "expected int")
_config_case("config: zero width", tiny_config("widths = [4, 0]"), "model.widths[1]", "minimum 1")
_config_case("config: one class", tiny_config("num_classes = 1"), "model.num_classes", "minimum 2")
_config_case("config: unknown choice upsample = 'bicubic'", tiny_config("upsample = 'bicubic'"), "model.upsample",
             "transposed, bilinear")
_config_case("config: [model] is a string", 'model = "big"\n', "model", "expected a table")
_config_case("config: skip from a stride the encoder lacks", tiny_config("skips = [4]"), "model.skips",
             "allowed")
_config_case("config: more down-sampling than min_size allows", tiny_config("widths = [4, 8, 16, 32, 64]\n"
             "blocks = [1, 1, 1, 1, 1]"), "model.min_size", "at least 16")
_config_case("config: negative learning rate", tiny_config(train="lr = -0.1"), "train.lr", "minimum")
_config_case("config: scale range reversed", tiny_config(train="scale = [1.5, 0.5]"), "train.scale", "low <= high")
_config_case("config: NUL bytes inside", TINY_CONFIG.replace("[train]", "[tr\x00ain]"), "bad.toml",
             "not valid TOML")


@case("config: a folder given as the config file", "describe", "is a directory", "expected a TOML")
def _(ws: Workspace, folder: Path) -> Call:
    return _describe(folder)


@case("config: missing file", "describe", "nothing.toml", "no such config file")
def _(ws: Workspace, folder: Path) -> Call:
    return _describe(folder / "nothing.toml")


# --- train: dataset folders, images, masks, run folders --------------------------------------------------------

def _train(ws: Workspace, folder: Path, data: Path, *extra: object, config: Path | None = None) -> Call:
    out = folder / "run"
    return Call(["train", config or ws.config, "--data", data, "--out", out, "--quiet", *extra], [folder])


def _data_case(name: str, edit: Callable[[Path], object], *expect: str,
               commands: tuple[str, ...] = ("train", "evaluate", "check")) -> None:
    """A copy of the good dataset changed by ``edit(data_dir)``, given to each of ``commands``."""
    for command in commands:
        def build(ws: Workspace, folder: Path, command: str = command) -> Call:
            data = ws.copy_data(folder)
            edit(data)
            if command == "train":
                return _train(ws, folder, data)
            if command == "evaluate":
                return _evaluate(ws, folder, ws.model, data=data)
            if command == "segment":
                image = next((data / "images").glob("s0.*"))
                return Call(["segment", ws.model, image, "--out", folder / "out", "--quiet"], [folder])
            return Call([command, data], [folder])
        case(name, command, *expect)(build)


def _classes_case(name: str, old: str, new: str, *expect: str) -> None:
    """The good classes.toml with ``old`` replaced by ``new``."""
    _data_case(name, lambda d: (d / "classes.toml").write_text(CLASSES_TOML.replace(old, new)), *expect)


def _image_case(name: str, edit: Callable[[Path], object], *expect: str) -> None:
    """A bad image file: the same case for every command that reads images."""
    _data_case(name, edit, *expect, commands=("train", "evaluate", "check", "segment"))


def _replace_image(data: Path, name: str, write: Callable[[Path], object]) -> None:
    for p in (data / "images").glob("s0.*"):
        p.unlink()
    write(data / "images" / name)


def _replace_mask(data: Path, name: str, write: Callable[[Path], object]) -> None:
    for p in (data / "masks").glob("s0.*"):
        p.unlink()
    write(data / "masks" / name)


@case("dataset folder missing", "train", "no-such-data", "not a folder")
def _(ws: Workspace, folder: Path) -> Call:
    return _train(ws, folder, folder / "no-such-data")


@case("dataset path is a regular file", "train", "a-regular-file", "not a folder")
def _(ws: Workspace, folder: Path) -> Call:
    return _train(ws, folder, ws.file)


_data_case("classes.toml: not TOML", lambda d: (d / "classes.toml").write_text("[[classes]\nid = 0\n"),
           "classes.toml", "TOML")
_classes_case("classes.toml: duplicate id", "id = 2", "id = 1", "classes.toml", "duplicate id 1")
_classes_case("classes.toml: duplicate colour", "#c03020", "#2050c0", "classes.toml", "duplicate color #2050c0")
_classes_case("classes.toml: ids with a gap", "id = 2", "id = 5", "classes.toml", "without gaps")
_data_case("classes.toml: missing", lambda d: (d / "classes.toml").unlink(), "classes.toml", "missing")
_classes_case("classes.toml: colour value 300", '"#c03020"', "[300, 0, 0]", "classes[2].color", "0..255")
_classes_case("classes.toml: ignore value is a class id", "ignore = 255", "ignore = 1", "classes.toml", "ignore = 1")
_classes_case("classes.toml: unknown key", 'name = "roof"', 'name = "roof"\ncolour = "#000000"', "classes.toml",
              "'colour'")
_classes_case("classes.toml: id is a string", "id = 2", 'id = "2"', "classes[2].id", "expected an integer")
_data_case("classes.toml: a folder", lambda d: ((d / "classes.toml").unlink(), (d / "classes.toml").mkdir()),
           "classes.toml", "toml")
_data_case("classes.toml: 4 classes for a 3-class config", lambda d: (d / "classes.toml").write_text(
    CLASSES_TOML + '\n[[classes]]\nid = 3\nname = "track"\ncolor = "#ffff00"\n'), "model.num_classes", "4",
    commands=("train",))
_image_case("image: truncated PNG", lambda d: truncate(d / "images" / "s0.png"), "s0.png", "truncated")
_image_case("image: random bytes named .png", lambda d: garbage(d / "images" / "s0.png"), "s0.png",
           "not a readable image")
_image_case("image: zero-byte file", lambda d: (d / "images" / "s0.png").write_bytes(b""), "s0.png", "empty")
_image_case("image: PNG signature then garbage", lambda d: garbage(d / "images" / "s0.png", 300,
           b"\x89PNG\r\n\x1a\n"), "s0.png", "image")
_image_case("image: truncated JPEG", lambda d: _replace_image(d, "s0.jpg", lambda p: truncate(write_jpeg(p), 0.4)),
           "s0.jpg", "truncated")
_image_case("image: random bytes named .jpg", lambda d: _replace_image(d, "s0.jpg", garbage), "s0.jpg",
           "not a readable image")
_image_case("image: TIFF header then garbage", lambda d: _replace_image(d, "s0.tif", lambda p: garbage(
    p, 400, b"II*\x00")), "s0.tif", "TIFF")
_image_case("image: truncated TIFF", lambda d: _replace_image(d, "s0.tif", lambda p: truncate(write_tiff(
    p, scene(0)[0]), 0.6)), "s0.tif", "truncated")
_image_case("image: 10 000 bands", lambda d: _replace_image(d, "s0.tif", lambda p: write_tiff(
    p, np.zeros((2, 2, 10_000), np.uint8), photometric="minisblack", planarconfig="contig")), "s0.tif", "bands")
_image_case("image: 0 bands", lambda d: _replace_image(d, "s0.tif", lambda p: write_tiff(
    p, np.zeros((24, 24, 0), np.uint8), photometric="minisblack", planarconfig="contig")), "s0.tif", "expected")
_image_case("image: 0×0 pixels", lambda d: _replace_image(d, "s0.tif", lambda p: write_tiff(
    p, np.zeros((0, 0, 3), np.uint8), photometric="minisblack", planarconfig="contig")), "s0.tif", "expected")
_image_case("image: NaN in a float TIFF", lambda d: _replace_image(d, "s0.tif", lambda p: write_tiff(
    p, _with(scene(0)[0].astype(np.float32), np.nan))), "s0.tif", "nan")
_image_case("image: inf in a float TIFF", lambda d: _replace_image(d, "s0.tif", lambda p: write_tiff(
    p, _with(scene(0)[0].astype(np.float32), np.inf))), "s0.tif", "inf")
_image_case("image: complex-valued TIFF", lambda d: _replace_image(d, "s0.tif", lambda p: write_tiff(
    p, scene(0)[0].astype(np.complex64))), "s0.tif", "pixel type")
_image_case("image: 16-bit colour PNG", lambda d: _replace_image(d, "s0.png", write_rgb16_png), "s0.png",
           "16-bit colour PNG")
_image_case("image: 4 bands for a 3-band net", lambda d: _replace_image(d, "s0.tif", lambda p: write_tiff(
    p, np.dstack([scene(0)[0], np.full((24, 24), 255, np.uint8)]), photometric="minisblack",
    planarconfig="contig")), "s0.tif", "bands")
_image_case("image: CMYK JPEG", lambda d: _replace_image(d, "s0.jpg", write_cmyk_jpeg), "s0.jpg", "CMYK")
_image_case("image: one band per TIFF page", lambda d: _replace_image(d, "s0.tif", write_pages), "s0.tif",
            "holds 3 images")
_data_case("vector labels: a class not in classes.toml", lambda d: _vector_labels(d, "lichen"), "labels.gpkg",
           "lichen")
_image_case("image: header claims 100 000 × 100 000 pixels", lambda d: png_bomb_header(
    d / "images" / "s0.png", 100_000, 100_000), "s0.png", "limit")
_data_case("mask: another size", lambda d: write_png(d / "masks" / "s0.png", scene(0)[1][:20, :22]),
           "s0.png", "24")
_data_case("mask: ids outside classes.toml", lambda d: write_png(d / "masks" / "s0.png", np.full((24, 24), 7,
           np.uint8)), "s0.png", "not in classes.toml")
_data_case("mask: RGB colour not in classes.toml", lambda d: write_png(d / "masks" / "s0.png", np.full(
    (24, 24, 3), 123, np.uint8)), "s0.png", "colours not in classes.toml")
_data_case("mask: lossy JPEG", lambda d: _replace_mask(d, "s0.jpg", write_jpeg), "s0.jpg", "expected .png")
_data_case("mask: 16-bit TIFF", lambda d: _replace_mask(d, "s0.tif", lambda p: write_tiff(
    p, scene(0)[1].astype(np.uint16))), "s0.tif", "8-bit")
_data_case("mask: truncated PNG", lambda d: truncate(d / "masks" / "s0.png"), "s0.png", "truncated")
_data_case("image without a mask", lambda d: (d / "masks" / "s1.png").unlink(), "s1.png", "no mask")
_data_case("images/ is a regular file", lambda d: (shutil.rmtree(d / "images"), (d / "images").write_text("x")),
           "images", "missing folder")
_data_case("no images at all", lambda d: (shutil.rmtree(d / "images"), (d / "images").mkdir(),
           shutil.rmtree(d / "masks"), (d / "masks").mkdir()), "images", "no images")


def _with(array: np.ndarray, value: float) -> np.ndarray:
    array = array.copy()
    array[3, 5, 1] = value
    return array


def write_cmyk_jpeg(path: Path) -> Path:
    from PIL import Image

    Image.fromarray(scene(0)[0]).convert("CMYK").save(path, quality=90)
    return path


def write_pages(path: Path) -> Path:
    """One image band per TIFF page (three pages)."""
    for band in np.moveaxis(scene(0)[0], 2, 0):
        write_tiff(path, band, append=True, photometric="minisblack")
    return path


def _vector_labels(data: Path, name: str) -> None:
    """Replace masks/ by a GeoPackage whose one feature has class ``name``."""
    import pyogrio.raw
    import shapely

    shutil.rmtree(data / "masks")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # pyogrio warns that the layer has no CRS: as meant here
        pyogrio.raw.write(data / "labels.gpkg", shapely.to_wkb(np.array([shapely.box(0, 0, 10, 10)], dtype=object)),
                          field_data=[np.array([name], dtype=object)], fields=["class"], geometry_type="Polygon",
                          driver="GPKG")


def write_jpeg(path: Path) -> Path:
    from PIL import Image

    path.parent.mkdir(parents=True, exist_ok=True)
    Image.fromarray(scene(0)[0]).save(path, quality=90)
    return path


def write_rgb16_png(path: Path) -> Path:
    """A 16-bit RGB PNG (colour type 2, bit depth 16), written chunk by chunk (PNG specification 11.2.2)."""
    h = w = 24
    rows = b"".join(b"\x00" + np.full((w, 3), 1000, ">u2").tobytes() for _ in range(h))
    data = (b"\x89PNG\r\n\x1a\n" + png_chunk(b"IHDR", struct.pack(">IIBBBBB", w, h, 16, 2, 0, 0, 0))
            + png_chunk(b"IDAT", zlib.compress(rows)) + png_chunk(b"IEND", b""))
    path.write_bytes(data)
    return path


@case("run folder already holds a run", "train", "already holds a run", "--resume")
def _(ws: Workspace, folder: Path) -> Call:
    run = folder / "run"
    run.mkdir()
    (run / "metrics.csv").write_text("epoch,val_miou\n1,0.5\n")
    return _train(ws, folder, ws.data)


@case("--resume with no resume point", "train", "resume.pt", "no resume point")
def _(ws: Workspace, folder: Path) -> Call:
    return _train(ws, folder, ws.data, "--resume")


@case("--resume with a garbage resume.pt", "train", "resume.pt", "not a readable resume point")
def _(ws: Workspace, folder: Path) -> Call:
    garbage(folder / "run" / "resume.pt")
    return _train(ws, folder, ws.data, "--resume")


@case("--resume with a resume point of another config", "train", "resume.pt", "different config")
def _(ws: Workspace, folder: Path) -> Call:
    import tomllib

    from fcnkit import runstate
    from fcnkit.config import config_from_dict, config_to_dict
    other = config_to_dict(config_from_dict(tomllib.loads(tiny_config(train="lr = 0.5"))))
    (folder / "run").mkdir()
    runstate.save_resume(folder / "run" / runstate.RESUME_FILE, {
        "config_hash": runstate.config_hash(other), "config": json.dumps(other), "model": {}, "optimizer": {},
        "rng": {}, "progress": {}})
    return _train(ws, folder, ws.data, "--resume")


@case("--out is a regular file", "train", "a-regular-file", "run folder")
def _(ws: Workspace, folder: Path) -> Call:
    return Call(["train", ws.config, "--data", ws.data, "--out", ws.file, "--quiet"], [ws.file])


@case("--out in an unwritable place", "train", "out")
def _(ws: Workspace, folder: Path) -> Call:
    out = ws.unwritable(folder)
    return Call(["train", ws.config, "--data", ws.data, "--out", out, "--quiet"], [folder, out])


@case("--init is not a safetensors file", "train", "init.safetensors", "not a safetensors")
def _(ws: Workspace, folder: Path) -> Call:
    return _train(ws, folder, ws.data, "--init", garbage(folder / "init.safetensors"))


@case("--epochs 0", "train", "train.epochs", "minimum 1")
def _(ws: Workspace, folder: Path) -> Call:
    return _train(ws, folder, ws.data, "--epochs", 0)


@case("train.batch of patches beyond available memory", "train", "train.batch", "memory")
def _(ws: Workspace, folder: Path) -> Call:
    call = _train(ws, folder, ws.data)
    call.env = {"FCNKIT_MAX_MEMORY": "16K"}  # a very small machine (the test net's whole step needs ~0.2 MiB)
    return call


@case("--epochs not a number", "train", "--epochs", "int")
def _(ws: Workspace, folder: Path) -> Call:
    return _train(ws, folder, ws.data, "--epochs", "many")


# --- model files (evaluate, export, segment) -----------------------------------------------------------------

def _evaluate(ws: Workspace, folder: Path, model: Path, *extra: object, data: Path | None = None) -> Call:
    return Call(["evaluate", model, "--data", data or ws.data, "--out", folder / "scores.json", "--quiet", *extra],
                [folder])


def _model_case(name: str, make: Callable[[Workspace, Path], Path], *expect: str) -> None:
    """A bad model file, given to every command that reads one."""
    for command in ("evaluate", "segment", "export", "train"):
        def build(ws: Workspace, folder: Path, command: str = command) -> Call:
            model = make(ws, folder)
            if command == "evaluate":
                return _evaluate(ws, folder, model)
            if command == "segment":
                return Call(["segment", model, ws.data / "images" / "s0.png", "--out", folder / "out", "--quiet"],
                            [folder])
            if command == "train":
                return _train(ws, folder, ws.data, "--init", model)
            return Call(["export", model, "--out", folder / "m.onnx"], [folder])
        case(name, command, *expect)(build)


def _meta_edit(key: str, value: object) -> Callable[[Workspace, Path], Path]:
    def make(ws: Workspace, folder: Path) -> Path:
        def edit(m: dict) -> dict:
            if value is None:
                m.pop("fcnkit." + key)
            else:
                m["fcnkit." + key] = value if isinstance(value, str) else json.dumps(value)
            return m
        return rewrite_model(ws.model, folder / "m.safetensors", meta=edit)
    return make


def _meta_edit_many(**values: object) -> Callable[[Workspace, Path], Path]:
    def make(ws: Workspace, folder: Path) -> Path:
        def edit(m: dict) -> dict:
            m.update({"fcnkit." + k: v if isinstance(v, str) else json.dumps(v) for k, v in values.items()})
            return m
        return rewrite_model(ws.model, folder / "m.safetensors", meta=edit)
    return make


_model_case("model: random bytes", lambda ws, f: garbage(f / "m.safetensors"), "m.safetensors",
            "not a safetensors")
_model_case("model: zero-byte file", lambda ws, f: (f / "m.safetensors").write_bytes(b"") or f / "m.safetensors",
            "m.safetensors", "not a safetensors")
_model_case("model: missing", lambda ws, f: f / "m.safetensors", "m.safetensors", "no such model file")
_model_case("model: a folder", lambda ws, f: f, "model-a-folder", "model file")
_model_case("model: truncated safetensors", lambda ws, f: truncate(shutil.copy(ws.model, f / "m.safetensors"), 0.7),
            "m.safetensors", "not a safetensors")
_model_case("model: safetensors without metadata", lambda ws, f: write_safetensors(
    f / "m.safetensors", model_tensors(ws.model), None), "m.safetensors", "missing")
_model_case("model: metadata config is not JSON", _meta_edit("config", "{widths: [4"), "fcnkit.config",
            "not valid JSON")
_model_case("model: metadata config has an unknown key", _meta_edit("config", {"model": {"widht": [4]}}),
            "model.widht", "unknown key")
_model_case("model: metadata classes duplicate a colour", _meta_edit("classes", {"ignore": 255, "classes": [
    {"id": 0, "name": "a", "color": "#000001"}, {"id": 1, "name": "b", "color": "#000001"},
    {"id": 2, "name": "c", "color": "#000003"}]}), "fcnkit.classes", "duplicate color")
_model_case("model: metadata std has a zero", _meta_edit("std", [50.0, 0.0, 50.0]), "fcnkit.std", "positive")
_model_case("model: metadata mean holds NaN", _meta_edit("mean", "[NaN, 1, 2]"), "fcnkit.mean", "finite")
_model_case("model: metadata mean of 2 bands, std of 3", _meta_edit("mean", [1.0, 2.0]), "m.safetensors", "bands")
_model_case("model: metadata kind unknown", _meta_edit("kind", "mystery"), "mystery", "expected one of")
_model_case("model: metadata key missing", _meta_edit("version", None), "fcnkit.version", "missing")
_model_case("model: weights of the wrong shape", lambda ws, f: rewrite_model(ws.model, f / "m.safetensors",
            tensors=lambda t: {k: (v[:1] if v.ndim else v) for k, v in t.items()}), "m.safetensors", "wrong shape")
_model_case("model: a weight missing", lambda ws, f: rewrite_model(ws.model, f / "m.safetensors",
            tensors=lambda t: dict(list(t.items())[1:])), "m.safetensors", "missing")
_model_case("model: converted kind naming user code", _meta_edit_many(
    kind="dense-classifier", extra={"recipe": {}, "source": {"source": "factory", "factory": "os:system"}}),
    "m.safetensors", "converted net")
_model_case("model: pickle payload named .safetensors", lambda ws, f: pickle_payload(
    f / "m.safetensors", f / "MARKER"), "m.safetensors", "not a safetensors")


@case("model: 4 bands, images 3", "evaluate", "s0.png", "4")
def _(ws: Workspace, folder: Path) -> Call:
    return _evaluate(ws, folder, ws.model4)


@case("model: classes differ from classes.toml", "evaluate", "classes.toml", "differ")
def _(ws: Workspace, folder: Path) -> Call:
    data = ws.copy_data(folder)
    (data / "classes.toml").write_text(CLASSES_TOML.replace('"roof"', '"reef"'))
    return _evaluate(ws, folder, ws.model, data=data)


@case("--out in an unwritable folder", "evaluate", "scores.json", "cannot write")
def _(ws: Workspace, folder: Path) -> Call:
    out = ws.unwritable(folder)
    return Call(["evaluate", ws.model, "--data", ws.data, "--out", out / "scores.json", "--quiet"], [folder, out])


@case("--out is a folder", "evaluate", "scores.json", "folder")
def _(ws: Workspace, folder: Path) -> Call:
    (folder / "scores.json").mkdir()
    return _evaluate(ws, folder, ws.model)


@case("--report in a missing folder", "evaluate", "report.html", "does not exist")
def _(ws: Workspace, folder: Path) -> Call:
    return _evaluate(ws, folder, ws.model, "--report", folder / "nowhere" / "report.html")


@case("--curves file missing", "evaluate", "metrics.csv", "no such")
def _(ws: Workspace, folder: Path) -> Call:
    return _evaluate(ws, folder, ws.model, "--report", folder / "r.html", "--curves", folder / "metrics.csv")


@case("--tile 1 (below the net's factor)", "evaluate", "tile", "factor")
def _(ws: Workspace, folder: Path) -> Call:
    return _evaluate(ws, folder, ws.model, "--tile", 1)


@case("--batch 0", "evaluate", "batch", ">= 1")
def _(ws: Workspace, folder: Path) -> Call:
    return _evaluate(ws, folder, ws.model, "--batch", 0)


@case("--overlap larger than the tile", "evaluate", "overlap", "use overlap <=")
def _(ws: Workspace, folder: Path) -> Call:
    return _evaluate(ws, folder, ws.model, "--tile", 16, "--overlap", 64)


@case("--exact together with --tta", "evaluate", "tta", "exact")
def _(ws: Workspace, folder: Path) -> Call:
    return _evaluate(ws, folder, ws.model, "--exact", "--tta")


@case("--max-pixels below the image size", "evaluate", "s0.png", "limit")
def _(ws: Workspace, folder: Path) -> Call:
    return _evaluate(ws, folder, ws.model, "--max-pixels", 100)


@case("--tile and --batch beyond available memory", "evaluate", "--batch", "memory")
def _(ws: Workspace, folder: Path) -> Call:
    data = ws.copy_data(folder)
    image, mask = scene(3, 256)
    write_png(data / "images" / "big.png", image)
    write_png(data / "masks" / "big.png", mask)
    return Call(_evaluate(ws, folder, ws.model, "--tile", 256, "--batch", 64, data=data).argv, [folder],
                env={"FCNKIT_MAX_MEMORY": "1M"})


@case("--window unknown", "evaluate", "--window", "hann")
def _(ws: Workspace, folder: Path) -> Call:
    return _evaluate(ws, folder, ws.model, "--window", "gauss")


_data_case("every mask pixel unlabelled", lambda d: [write_png(p, np.full((24, 24), 255, np.uint8))
           for p in (d / "masks").iterdir()], "masks", "no labelled pixels", commands=("evaluate",))


# --- export ---------------------------------------------------------------------------------------------------

@case("export: model is random bytes", "export", "m.safetensors", "not a safetensors")
def _(ws: Workspace, folder: Path) -> Call:
    return Call(["export", garbage(folder / "m.safetensors"), "--out", folder / "m.onnx"], [folder])


@case("export: --out in a missing folder", "export", "m.onnx", "does not exist")
def _(ws: Workspace, folder: Path) -> Call:
    return Call(["export", ws.model, "--out", folder / "nowhere" / "m.onnx"], [folder])


@case("export: --out is a folder", "export", "m.onnx", "folder")
def _(ws: Workspace, folder: Path) -> Call:
    (folder / "m.onnx").mkdir()
    return Call(["export", ws.model, "--out", folder / "m.onnx"], [folder])


@case("export: --out in an unwritable folder", "export", "m.onnx", "cannot write")
def _(ws: Workspace, folder: Path) -> Call:
    out = ws.unwritable(folder)
    return Call(["export", ws.model, "--out", out / "m.onnx"], [folder, out])


@case("export: --format unknown", "export", "--format", "onnx")
def _(ws: Workspace, folder: Path) -> Call:
    return Call(["export", ws.model, "--format", "tflite", "--out", folder / "m.tflite"], [folder])


# --- convert --------------------------------------------------------------------------------------------------

def _convert(folder: Path, *args: object) -> Call:
    return Call(["convert", *args], [folder])


@case("convert: --weights is a pickle payload (.pt)", "convert", "evil.pt", "not a readable")
def _(ws: Workspace, folder: Path) -> Call:
    return _convert(folder, "resnet18", "--native", 64, "--weights", torch_zip_payload(folder / "evil.pt",
                    folder / "MARKER"))


@case("convert: --weights is a raw pickle (.pth)", "convert", "evil.pth", "not a readable")
def _(ws: Workspace, folder: Path) -> Call:
    return _convert(folder, "resnet18", "--native", 64, "--weights", pickle_payload(folder / "evil.pth",
                    folder / "MARKER"))


@case("convert: --weights random bytes", "convert", "w.pth", "not a readable")
def _(ws: Workspace, folder: Path) -> Call:
    return _convert(folder, "resnet18", "--native", 64, "--weights", garbage(folder / "w.pth"))


@case("convert: --weights zero-byte safetensors", "convert", "w.safetensors", "not a readable")
def _(ws: Workspace, folder: Path) -> Call:
    (folder / "w.safetensors").write_bytes(b"")
    return _convert(folder, "resnet18", "--native", 64, "--weights", folder / "w.safetensors")


@case("convert: --weights of another architecture", "convert", "w.safetensors", "parameter")
def _(ws: Workspace, folder: Path) -> Call:
    import torch

    path = write_safetensors(folder / "w.safetensors", {"features.0.weight": torch.zeros(8, 3, 3, 3)}, None)
    return _convert(folder, "mobilenet_v3_small", "--native", 64, "--weights", path)


@case("convert: --weights missing", "convert", "w.pth", "not found")
def _(ws: Workspace, folder: Path) -> Call:
    return _convert(folder, "resnet18", "--native", 64, "--weights", folder / "w.pth")


@case("convert: unknown architecture", "convert", "vgg99", "torchvision")
def _(ws: Workspace, folder: Path) -> Call:
    return _convert(folder, "vgg99", "--native", 224, "--random-weights")


@case("convert: factory that cannot be imported", "convert", "no_such_pkg", "cannot import")
def _(ws: Workspace, folder: Path) -> Call:
    return _convert(folder, "no_such_pkg.nets:make", "--native", 32, "--weights", ws.model)


@case("convert: TorchScript source is random bytes", "convert", "net.pt", "TorchScript")
def _(ws: Workspace, folder: Path) -> Call:
    return _convert(folder, garbage(folder / "net.pt"), "--native", 32)


@case("convert: TorchScript source is a pickle payload", "convert", "net.pt", "TorchScript")
def _(ws: Workspace, folder: Path) -> Call:
    return _convert(folder, pickle_payload(folder / "net.pt", folder / "MARKER"), "--native", 32)


@case("convert: --grow without --out", "convert", "--grow", "--out")
def _(ws: Workspace, folder: Path) -> Call:
    return _convert(folder, "mobilenet_v3_small", "--native", 64, "--random-weights", "--grow")


@case("convert: --classes with duplicate ids", "convert", "classes.toml", "duplicate id")
def _(ws: Workspace, folder: Path) -> Call:
    (folder / "classes.toml").write_text(CLASSES_TOML.replace("id = 2", "id = 1"))
    return _convert(folder, "mobilenet_v3_small", "--native", 64, "--random-weights", "--classes",
                    folder / "classes.toml", "--out", folder / "m.safetensors")


@case("convert: --keep not a list of numbers", "convert", "--keep", "whole numbers")
def _(ws: Workspace, folder: Path) -> Call:
    return _convert(folder, "mobilenet_v3_small", "--native", 64, "--random-weights", "--keep", "1,two")


@case("convert: --out in an unwritable folder", "convert", "m.safetensors", "write")
def _(ws: Workspace, folder: Path) -> Call:
    out = ws.unwritable(folder)
    return Call(["convert", "mobilenet_v3_small", "--native", 64, "--random-weights", "--out",
                 out / "m.safetensors", "--keep", "0,1,2"], [folder, out])


# --- demo ------------------------------------------------------------------------------------------------------

@case("demo: --out is a regular file", "demo", "a-regular-file", "not a folder")
def _(ws: Workspace, folder: Path) -> Call:
    return Call(["demo", "--quick", "--quiet", "--out", ws.file], [ws.file])


@case("demo: --out holds someone else's files", "demo", "not empty", "nothing was changed")
def _(ws: Workspace, folder: Path) -> Call:
    (folder / "thesis.txt").write_text("precious\n")
    return Call(["demo", "--quick", "--quiet", "--out", folder], [folder])


# --- segment -----------------------------------------------------------------------------------------------------

def _segment(ws: Workspace, folder: Path, *inputs: object, model: Path | None = None, out: Path | None = None,
             extra: tuple = ()) -> Call:
    out = out or folder / "out"
    return Call(["segment", model or ws.model, *(inputs or [ws.data / "images" / "s0.png"]), "--out", out,
                 "--quiet", *extra], [folder, out])


@case("segment: --out is a regular file", "segment", "a-regular-file", "folder")
def _(ws: Workspace, folder: Path) -> Call:
    return _segment(ws, folder, out=ws.file)


@case("segment: --out in an unwritable place", "segment", "out", "output folder")
def _(ws: Workspace, folder: Path) -> Call:
    return _segment(ws, folder, out=ws.unwritable(folder))


@case("segment: input missing", "segment", "nothing.tif", "no such image")
def _(ws: Workspace, folder: Path) -> Call:
    return _segment(ws, folder, folder / "nothing.tif")


@case("segment: two inputs with the same stem", "segment", "s0", "overwrite")
def _(ws: Workspace, folder: Path) -> Call:
    return _segment(ws, folder, ws.data / "images" / "s0.png", write_tiff(folder / "s0.tif", scene(0)[0]))


@case("segment: unsupported file type", "segment", "s0.bmp", "unsupported image type")
def _(ws: Workspace, folder: Path) -> Call:
    from PIL import Image

    Image.fromarray(scene(0)[0]).save(folder / "s0.bmp")
    return _segment(ws, folder, folder / "s0.bmp")


@case("segment: model with 4 bands, image 3", "segment", "s0.png", "4")
def _(ws: Workspace, folder: Path) -> Call:
    return _segment(ws, folder, model=ws.model4)


@case("segment: --max-pixels below the image size", "segment", "s0.png", "limit")
def _(ws: Workspace, folder: Path) -> Call:
    return _segment(ws, folder, extra=("--max-pixels", 100))


@case("segment: --exact with a tile smaller than the margin allows", "segment", "tile", "exact")
def _(ws: Workspace, folder: Path) -> Call:
    return _segment(ws, folder, write_tiff(folder / "big.tif", np.zeros((64, 64, 3), np.uint8)),
                    extra=("--exact", "--tile", 4))


@case("segment: --tile and --batch beyond available memory", "segment", "--batch", "memory")
def _(ws: Workspace, folder: Path) -> Call:
    call = _segment(ws, folder, write_tiff(folder / "big.tif", np.zeros((512, 512, 3), np.uint8)),
                    extra=("--tile", 128, "--batch", 64))
    call.env = {"FCNKIT_MAX_MEMORY": "8M"}  # a small machine: the cap stands in for little free memory
    return call


@case("segment: negative --pixel-size", "segment", "pixel_size", "positive")
def _(ws: Workspace, folder: Path) -> Call:
    return _segment(ws, folder, extra=("--pixel-size", -0.5))


@case("segment: --min-area without known pixel areas", "segment", "min_area", "pixel areas")
def _(ws: Workspace, folder: Path) -> Call:
    return _segment(ws, folder, extra=("--polygons", "--min-area", 5))


@case("segment: a folder without images", "segment", "empty", "no image")
def _(ws: Workspace, folder: Path) -> Call:
    (folder / "empty").mkdir()
    return _segment(ws, folder, folder / "empty")


# --- check and scenes ----------------------------------------------------------------------------------------------

@case("check: dataset folder missing", "check", "no-such-data", "not a folder")
def _(ws: Workspace, folder: Path) -> Call:
    return Call(["check", folder / "no-such-data"], [folder])


@case("check: dataset path is a regular file", "check", "a-regular-file", "not a folder")
def _(ws: Workspace, folder: Path) -> Call:
    return Call(["check", ws.file], [folder])


@case("scenes: --count 0", "scenes", "count", "≥ 1")
def _(ws: Workspace, folder: Path) -> Call:
    return Call(["scenes", "--out", folder / "scenes", "--count", 0], [folder])


@case("scenes: --size 0", "scenes", "size", "≥ 8")
def _(ws: Workspace, folder: Path) -> Call:
    return Call(["scenes", "--out", folder / "scenes", "--size", 0, "--count", 1], [folder])


@case("scenes: --out DIR is a regular file", "scenes", "a-regular-file", "folder")
def _(ws: Workspace, folder: Path) -> Call:
    return Call(["scenes", "--out", ws.file, "--count", 1, "--size", 32], [folder])


@case("scenes: --out DIR holds other files", "scenes", "scenes", "empty")
def _(ws: Workspace, folder: Path) -> Call:
    (folder / "scenes").mkdir()
    (folder / "scenes" / "notes.txt").write_text("mine\n")
    return Call(["scenes", "--out", folder / "scenes", "--count", 1, "--size", 32], [folder])


@case("scenes: --out DIR in an unwritable place", "scenes", "out", "not a directory")
def _(ws: Workspace, folder: Path) -> Call:
    out = ws.unwritable(folder)
    return Call(["scenes", "--out", out, "--count", 1, "--size", 32], [folder, out])


# --- an existing folder the user cannot write to ---------------------------------------------------------------

@case("read-only output folder (--out RO/run)", "train", "/run")
def _(ws: Workspace, folder: Path) -> Call:
    out = ws.read_only(folder) / "run"
    return Call(["train", ws.config, "--data", ws.data, "--out", out, "--quiet"], [folder, out])


@case("read-only output folder (--out RO/scores.json)", "evaluate", "scores.json", "cannot write here")
def _(ws: Workspace, folder: Path) -> Call:
    out = ws.read_only(folder) / "scores.json"
    return Call(["evaluate", ws.model, "--data", ws.data, "--out", out, "--quiet"], [folder, out])


@case("read-only output folder (--out RO/m.onnx)", "export", "m.onnx", "cannot write here")
def _(ws: Workspace, folder: Path) -> Call:
    out = ws.read_only(folder) / "m.onnx"
    return Call(["export", ws.model, "--out", out], [folder, out])


@case("read-only output folder (--out RO/maps)", "segment", "maps", "cannot create the output folder")
def _(ws: Workspace, folder: Path) -> Call:
    return _segment(ws, folder, out=ws.read_only(folder) / "maps")


@case("read-only output folder (--out RO/scenes)", "scenes", "/scenes")
def _(ws: Workspace, folder: Path) -> Call:
    out = ws.read_only(folder) / "scenes"
    return Call(["scenes", "--out", out, "--count", 1, "--size", 32], [folder, out])


@case("read-only output folder (--out RO/m.safetensors)", "convert", "m.safetensors", "cannot write here")
def _(ws: Workspace, folder: Path) -> Call:
    out = ws.read_only(folder) / "m.safetensors"
    return Call(["convert", "mobilenet_v3_small", "--native", 64, "--random-weights", "--keep", "0,1,2", "--out",
                 out], [folder, out])


@case("--max-pixels below the image size", "train", ".png", "limit")
def _(ws: Workspace, folder: Path) -> Call:
    return _train(ws, folder, ws.data, "--max-pixels", 100)


# --- reference samples: sample and assess ----------------------------------------------------------------------

def _labels(ws: Workspace) -> Path:
    return ws.data / "masks" / "s0.png"  # 24×24 class ids 0..2, 255 unlabelled


def _filled_sample(ws: Workspace, folder: Path, edit: Callable[[list[dict]], list[dict]] = lambda r: r,
                   fields: list[str] | None = None) -> Path:
    """A sample drawn from the first mask, its reference classes copied from the map, then ``edit``ed."""
    import csv

    from fcnkit.data.classes import load_classes
    from fcnkit.sampling import draw_sample

    drawn = folder / "drawn.csv"
    draw_sample(_labels(ws), drawn, classes=load_classes(ws.data / "classes.toml"), total=15, minimum=4)
    rows = list(csv.DictReader(open(drawn, newline="")))
    for r in rows:
        r["reference"] = r["map_class"]
    rows = edit(rows)
    path = folder / "filled.csv"
    with open(path, "w", newline="") as f:
        w = csv.DictWriter(f, fields or list(rows[0]), extrasaction="ignore")
        w.writeheader()
        w.writerows(rows)
    return path


def _assess(ws: Workspace, folder: Path, sample: Path, *more: object) -> Call:
    return Call(["assess", sample, "--labels", _labels(ws), "--classes", ws.data / "classes.toml", "--out",
                 f"{folder / 'a.json'},{folder / 'a.csv'}", *more], [folder])


@case("sample: LABELS is an RGB image", "sample", "s0.png", "one band of integer class ids")
def _(ws: Workspace, folder: Path) -> Call:
    return Call(["sample", ws.data / "images" / "s0.png", "--out", folder / "s.gpkg"], [folder])


@case("sample: LABELS missing", "sample", "nothing.tif", "no such image file")
def _(ws: Workspace, folder: Path) -> Call:
    return Call(["sample", folder / "nothing.tif", "--out", folder / "s.gpkg"], [folder])


@case("sample: label value outside the class table", "sample", "odd.png", "pixel value 9", "class id")
def _(ws: Workspace, folder: Path) -> Call:
    mask = scene(0)[1]
    mask[3, 3] = 9
    return Call(["sample", write_png(folder / "odd.png", mask), "--classes", ws.data / "classes.toml", "--out",
                 folder / "s.gpkg"], [folder])


@case("sample: --out of an unknown type (.txt)", "sample", "s.txt", ".gpkg")
def _(ws: Workspace, folder: Path) -> Call:
    return Call(["sample", _labels(ws), "--out", folder / "s.txt"], [folder])


@case("sample: --min-per-class -1", "sample", "minimum per class -1", "≥ 0")
def _(ws: Workspace, folder: Path) -> Call:
    return Call(["sample", _labels(ws), "--out", folder / "s.gpkg", "--min-per-class", -1], [folder])


@case("sample: --expected-accuracy 1.5", "sample", "user's accuracies", "between 0 and 1")
def _(ws: Workspace, folder: Path) -> Call:
    return Call(["sample", _labels(ws), "--out", folder / "s.gpkg", "--expected-accuracy", 1.5], [folder])


@case("sample: --chips without --image", "sample", "chips", "mapped image")
def _(ws: Workspace, folder: Path) -> Call:
    return Call(["sample", _labels(ws), "--out", folder / "s.gpkg", "--chips", folder / "chips"], [folder])


@case("sample: --out in an unwritable place", "sample", "s.gpkg", "cannot write here")
def _(ws: Workspace, folder: Path) -> Call:
    out = ws.unwritable(folder)
    return Call(["sample", _labels(ws), "--out", out / "s.gpkg"], [folder, out])


@case("assess: points without a reference class", "assess", "filled.csv", "no 'reference' class", "fill in")
def _(ws: Workspace, folder: Path) -> Call:
    return _assess(ws, folder, _filled_sample(ws, folder, lambda rows: [{**r, "reference": ""} if i % 4 == 0 else r
                                                                        for i, r in enumerate(rows)]))


@case("assess: unknown reference class name", "assess", "filled.csv", "'marsh' is unknown", "ground")
def _(ws: Workspace, folder: Path) -> Call:
    return _assess(ws, folder, _filled_sample(ws, folder, lambda rows: [{**rows[0], "reference": "marsh"},
                                                                        *rows[1:]]))


@case("assess: no reference field", "assess", "filled.csv", "no field 'reference'")
def _(ws: Workspace, folder: Path) -> Call:
    return _assess(ws, folder, _filled_sample(ws, folder, fields=["point_id", "row", "col", "map_id"]))


@case("assess: a mapped class without sample points", "assess", "filled.csv", "mapped pixels but 0 sample points")
def _(ws: Workspace, folder: Path) -> Call:
    return _assess(ws, folder, _filled_sample(ws, folder, lambda rows: [r for r in rows if r["map_id"] != "1"]))


@case("assess: map class differs from the label map", "assess", "filled.csv", "map_id", "same map")
def _(ws: Workspace, folder: Path) -> Call:
    return _assess(ws, folder, _filled_sample(
        ws, folder, lambda rows: [{**rows[0], "map_id": str((int(rows[0]["map_id"]) + 1) % 3)}, *rows[1:]]))


@case("assess: point row not a whole number", "assess", "filled.csv", "row = 'x'", "whole number")
def _(ws: Workspace, folder: Path) -> Call:
    return _assess(ws, folder, _filled_sample(ws, folder, lambda rows: [{**rows[0], "row": "x"}, *rows[1:]]))


@case("assess: sample is not a GeoPackage", "assess", "junk.gpkg", "not a readable GPKG")
def _(ws: Workspace, folder: Path) -> Call:
    (folder / "junk.gpkg").write_bytes(b"\x00" * 300)
    return _assess(ws, folder, folder / "junk.gpkg")


@case("assess: counts file without a pixels column", "assess", "counts.csv", "'pixels'")
def _(ws: Workspace, folder: Path) -> Call:
    (folder / "counts.csv").write_text("id,name,area\n0,ground,5\n1,water,6\n2,roof,7\n")
    return Call(["assess", _filled_sample(ws, folder), "--counts", folder / "counts.csv", "--out",
                 f"{folder / 'a.json'},{folder / 'a.csv'}"], [folder])


@case("assess: --out in an unwritable place", "assess", "a.json", "cannot write here")
def _(ws: Workspace, folder: Path) -> Call:
    out = ws.unwritable(folder)
    sample = _filled_sample(ws, folder)
    return Call(["assess", sample, "--labels", _labels(ws), "--out", f"{out / 'a.json'},{folder / 'a.csv'}"],
                [folder, out])


# --- nothing lost, nothing silently wrong --------------------------------------------------------------------

def _first_float(t: dict, value: float) -> dict:
    """The tensors with the first element of the first floating-point weight set to ``value``."""
    t = {k: v.clone() for k, v in t.items()}
    name = next(k for k, v in t.items() if v.is_floating_point())
    t[name].view(-1)[0] = value
    return t


_model_case("model: a NaN weight", lambda ws, f: rewrite_model(ws.model, f / "m.safetensors", tensors=lambda t:
            _first_float(t, math.nan)), "m.safetensors", "NaN or infinite", "finite weights")
_model_case("model: an infinite weight", lambda ws, f: rewrite_model(ws.model, f / "m.safetensors", tensors=lambda t:
            _first_float(t, math.inf)), "m.safetensors", "NaN or infinite", "finite weights")
_model_case("model: weights stored as int8", lambda ws, f: rewrite_model(ws.model, f / "m.safetensors", tensors=lambda
            t: {k: v.round().to(__import__("torch").int8) for k, v in t.items()}), "m.safetensors", "int8",
            "floating-point")
_model_case("model: metadata nested 100 000 deep", _meta_edit("extra", "[" * 100_000 + "]" * 100_000), "fcnkit.extra",
            "nested too deeply")
_model_case("model: metadata input_stats of 1 band for 3", _meta_edit("input_stats", {"min": [0], "max": [255]}),
            "fcnkit.input_stats", "3")
_config_case("config: arrays nested 5000 deep", "[model]\nwidths = " + "[" * 5000 + "]" * 5000 + "\n", "bad.toml",
             "nested too deeply")
_data_case("classes.toml: arrays nested 5000 deep", lambda d: (d / "classes.toml").write_text(
    "ignore = " + "[" * 5000 + "]" * 5000 + "\n"), "classes.toml", "nested too deeply")


# outputs that would destroy an input or a model

def _copy_model(ws: Workspace, folder: Path, name: str = "m.safetensors") -> Path:
    return Path(shutil.copy(ws.model, folder / name))


@case("export: --out is the model file itself", "export", "m.safetensors", "input of this run")
def _(ws: Workspace, folder: Path) -> Call:
    model = _copy_model(ws, folder)
    return Call(["export", model, "--out", model], [folder])


@case("export: --out is a hard link to the model file", "export", "linked.onnx", "input of this run")
def _(ws: Workspace, folder: Path) -> Call:
    model = _copy_model(ws, folder)
    os.link(model, folder / "linked.onnx")
    return Call(["export", model, "--out", folder / "linked.onnx"], [folder])


@case("export: --out is a symbolic link to the model file", "export", "alias.pt", "input of this run")
def _(ws: Workspace, folder: Path) -> Call:
    model = _copy_model(ws, folder)
    (folder / "alias.pt").symlink_to(model)
    return Call(["export", model, "--out", folder / "alias.pt", "--format", "torchscript"], [folder])


@case("export: --out is another model file", "export", "other.safetensors", "already holds a model file")
def _(ws: Workspace, folder: Path) -> Call:
    return Call(["export", ws.model, "--out", _copy_model(ws, folder, "other.safetensors")], [folder])


@case("evaluate: --out is the model file", "evaluate", "m.safetensors", "input of this run")
def _(ws: Workspace, folder: Path) -> Call:
    model = _copy_model(ws, folder)
    return Call(["evaluate", model, "--data", ws.data, "--out", model, "--quiet"], [folder])


@case("evaluate: --report is the model file", "evaluate", "m.safetensors", "input of this run")
def _(ws: Workspace, folder: Path) -> Call:
    model = _copy_model(ws, folder)
    return _evaluate(ws, folder, model, "--report", model)


@case("evaluate: --out is a mask of the data", "evaluate", "s1.png", "input of this run")
def _(ws: Workspace, folder: Path) -> Call:
    data = ws.copy_data(folder)
    return Call(["evaluate", ws.model, "--data", data, "--out", data / "masks" / "s1.png", "--quiet"], [folder])


@case("evaluate: --out is the dataset's vector label file", "evaluate", "labels.gpkg", "input of this run")
def _(ws: Workspace, folder: Path) -> Call:
    data = ws.copy_data(folder)
    _vector_labels(data, "water")
    return Call(["evaluate", ws.model, "--data", data, "--out", data / "labels.gpkg", "--quiet"], [folder])


@case("evaluate: --out and --report name one file", "evaluate", "same.html", "its own name")
def _(ws: Workspace, folder: Path) -> Call:
    return Call(["evaluate", ws.model, "--data", ws.data, "--out", folder / "same.html", "--report",
                 folder / "same.html", "--quiet"], [folder])


@case("evaluate: --curves not UTF-8", "evaluate", "metrics.csv", "cannot read")
def _(ws: Workspace, folder: Path) -> Call:
    (folder / "metrics.csv").write_bytes(b"epoch,val_miou\n1,0.5\n\xff\xfe,\x81\n")
    return _evaluate(ws, folder, ws.model, "--report", folder / "r.html", "--curves", folder / "metrics.csv")


def _run_folder(ws: Workspace, folder: Path) -> Path:
    """A finished-looking run folder: model, resume point, metrics."""
    import torch

    run = folder / "run"
    run.mkdir()
    _copy_model(ws, run, "model.safetensors")
    torch.save({"format": "fcnkit-resume/1", "model": {"w": torch.zeros(2)}}, run / "resume.pt")
    (run / "metrics.csv").write_text("epoch,val_miou\n1,0.5\n")
    return run


@case("convert: --out over a run's model beside its resume point", "convert", "model.safetensors",
      "already holds a model file")
def _(ws: Workspace, folder: Path) -> Call:
    run = _run_folder(ws, folder)
    return _convert(folder, "mobilenet_v3_small", "--native", 64, "--random-weights", "--keep", "0,1,2", "--out",
                    run / "model.safetensors")


@case("convert: --out is the --weights file", "convert", "w.safetensors", "input of this run")
def _(ws: Workspace, folder: Path) -> Call:
    from torchvision.models import mobilenet_v3_small

    w = write_safetensors(folder / "w.safetensors", mobilenet_v3_small().state_dict(), None)
    return _convert(folder, "mobilenet_v3_small", "--native", 64, "--weights", w, "--keep", "0,1,2", "--out", w)


@case("evaluate: --out over a run's metrics.csv", "evaluate", "metrics.csv", "metrics of the training run")
def _(ws: Workspace, folder: Path) -> Call:
    run = _run_folder(ws, folder)
    return Call(["evaluate", ws.model, "--data", ws.data, "--out", run / "metrics.csv", "--quiet"], [folder])


@case("segment: --out is the input folder after an earlier run", "segment", "s0.labels.png", "input of this run")
def _(ws: Workspace, folder: Path) -> Call:
    images = folder / "images"
    shutil.copytree(ws.data / "images", images)
    write_png(images / "s0.labels.png", scene(0)[1])  # what an earlier `segment ... images --out images` left
    return _segment(ws, folder, images, out=images)


@case("segment: --out holds a model file under an output name", "segment", "s0.areas.json", "model file")
def _(ws: Workspace, folder: Path) -> Call:
    (folder / "out").mkdir()
    _copy_model(ws, folder / "out", "s0.areas.json")
    return _segment(ws, folder)


@case("sample: the same --out file twice", "sample", "s.csv", "its own name")
def _(ws: Workspace, folder: Path) -> Call:
    return Call(["sample", _labels(ws), "--out", f"{folder / 's.csv'},{folder / 's.csv'}"], [folder])


@case("sample: --chips into the image's folder where a chip name is the image", "sample", "point_00001.png",
      "input of this run")
def _(ws: Workspace, folder: Path) -> Call:
    image = Path(shutil.copy(ws.data / "images" / "s0.png", folder / "point_00001.png"))
    return Call(["sample", _labels(ws), "--out", folder / "s.csv", "--image", image, "--chips", folder,
                 "--points", 5], [folder])


@case("assess: --out is the filled sample", "assess", "filled.csv", "input of this run")
def _(ws: Workspace, folder: Path) -> Call:
    sample = _filled_sample(ws, folder)
    return Call(["assess", sample, "--labels", _labels(ws), "--out", f"{folder / 'a.json'},{sample}"], [folder])


@case("assess: --report is the label map", "assess", "labels.png", "input of this run")
def _(ws: Workspace, folder: Path) -> Call:
    labels = Path(shutil.copy(_labels(ws), folder / "labels.png"))
    sample = _filled_sample(ws, folder)
    return Call(["assess", sample, "--labels", labels, "--out", f"{folder / 'a.json'},{folder / 'a.csv'}",
                 "--report", labels], [folder])


@case("--init is the run's own model, resumed", "train", "model.safetensors", "input of this run")
def _(ws: Workspace, folder: Path) -> Call:
    run = _run_folder(ws, folder)
    return _train(ws, folder, ws.data, "--resume", "--init", run / "model.safetensors")


_HELD: list[int] = []  # lock files held open for the rest of the session (a run in progress stands for it)


@case("run folder locked by another training run", "train", "run", "another training run")
def _(ws: Workspace, folder: Path) -> Call:
    import fcntl

    (folder / "run").mkdir()
    fd = os.open(folder / "run" / ".lock", os.O_RDWR | os.O_CREAT)
    fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)  # another open file description: conflicts as another process's
    os.write(fd, b"424242\n")
    _HELD.append(fd)
    return _train(ws, folder, ws.data)


# resume points that cannot be continued

def _resume_point(ws: Workspace, folder: Path, edit: Callable[[dict], object]) -> Call:
    """A real resume point of one epoch on the good data, changed by ``edit(state)``."""
    import torch

    call = _train(ws, folder, ws.data)
    code, _, err = run_cli(call.argv)
    assert code == 0, err
    path = folder / "run" / "resume.pt"
    state = torch.load(path, weights_only=True)
    edit(state)
    torch.save(state, path)
    return _train(ws, folder, ws.data, "--resume")


@case("--resume with a resume point missing 'optimizer'", "train", "resume.pt", "lacks 'optimizer'")
def _(ws: Workspace, folder: Path) -> Call:
    return _resume_point(ws, folder, lambda s: s.pop("optimizer"))


@case("--resume with a resume point whose weight has the wrong shape", "train", "resume.pt", "the net's is")
def _(ws: Workspace, folder: Path) -> Call:
    def edit(state: dict) -> None:
        name = next(iter(state["model"]))
        state["model"][name] = state["model"][name][:1]
    return _resume_point(ws, folder, edit)


@case("--resume with a resume point of other training data", "train", "resume.pt", "other training data")
def _(ws: Workspace, folder: Path) -> Call:
    call = _train(ws, folder, ws.data)
    code, _, err = run_cli(call.argv)
    assert code == 0, err
    other = write_dataset(folder / "other", count=4)
    return _train(ws, folder, other, "--resume")


# a starting model whose scores overflow on the data: blamed for it, not the learning rate

@case("--init model whose class scores overflow", "train", "huge.safetensors", "before any training step")
def _(ws: Workspace, folder: Path) -> Call:
    huge = rewrite_model(ws.model, folder / "huge.safetensors", tensors=lambda t: {
        k: v * 1e30 if k.endswith("weight") and v.ndim == 4 else v for k, v in t.items()})
    return _train(ws, folder, ws.data, "--init", huge)


# images far outside the range the model was trained on

def _stats_model(ws: Workspace, folder: Path) -> Path:
    stats = {"dtype": "uint8", "min": [0.0] * 3, "max": [255.0] * 3, "p01": [2.0] * 3, "p99": [250.0] * 3,
             "pixels": 1728}
    return rewrite_model(ws.model, folder / "m.safetensors",
                         meta=lambda m: {**m, "fcnkit.input_stats": json.dumps(stats)})


def _far_image(path: Path) -> Path:
    return write_tiff(path, _with(scene(0)[0].astype(np.float32), 1e30))


@case("image far outside the training range (a pixel of 1e30)", "segment", "s0.tif", "1e+30",
      "far outside the range 0..255")
def _(ws: Workspace, folder: Path) -> Call:
    return _segment(ws, folder, _far_image(folder / "s0.tif"), model=_stats_model(ws, folder))


@case("image far outside the training range (a pixel of 1e30)", "evaluate", "s0.tif", "1e+30",
      "far outside the range 0..255")
def _(ws: Workspace, folder: Path) -> Call:
    data = ws.copy_data(folder)
    _replace_image(data, "s0.tif", _far_image)
    return _evaluate(ws, folder, _stats_model(ws, folder), data=data)


# a full disk, as writes see it (a file size limit makes them fail with EFBIG)

@case("disk full while writing --out", "export", "m.onnx", "too large")
def _(ws: Workspace, folder: Path) -> Call:
    return Call(["export", ws.model, "--out", folder / "m.onnx"], [folder], fsize=2000)


@case("disk full while writing --out", "evaluate", "scores.json", "too large")
def _(ws: Workspace, folder: Path) -> Call:
    call = _evaluate(ws, folder, ws.model)
    call.fsize = 1000
    return call


@case("disk full while writing the resume point", "train", "resume.pt", "too large")
def _(ws: Workspace, folder: Path) -> Call:
    call = _train(ws, folder, ws.data)
    call.fsize = 4000
    return call


@case("disk full while writing the maps", "segment", "out", "too large")
def _(ws: Workspace, folder: Path) -> Call:
    call = _segment(ws, folder)
    call.fsize = 200
    return call


@case("demo: --out is a training run's folder", "demo", "run", "not empty", "nothing was changed")
def _(ws: Workspace, folder: Path) -> Call:
    return Call(["demo", "--quick", "--quiet", "--out", _run_folder(ws, folder)], [folder])


# special files where a file is read: a FIFO would block the reader until some process writes to it

def _fifo(path: Path) -> Path:
    path.unlink(missing_ok=True)
    os.mkfifo(path)
    return path


_image_case("image: a FIFO (named pipe) named s0.png", lambda d: _fifo(d / "images" / "s0.png"), "s0.png",
            "FIFO", "not a regular file")
_data_case("classes.toml: a FIFO (named pipe)", lambda d: _fifo(d / "classes.toml"), "classes.toml", "FIFO",
           "not a regular file")


@case("config: a FIFO (named pipe)", "describe", "bad.toml", "FIFO", "not a regular file")
def _(ws: Workspace, folder: Path) -> Call:
    return _describe(_fifo(folder / "bad.toml"))


_model_case("model: a FIFO (named pipe)", lambda ws, f: _fifo(f / "m.safetensors"), "m.safetensors", "FIFO",
            "not a regular file")


@case("evaluate: --curves is a FIFO (named pipe)", "evaluate", "metrics.csv", "FIFO", "not a regular file")
def _(ws: Workspace, folder: Path) -> Call:
    return _evaluate(ws, folder, ws.model, "--report", folder / "r.html", "--curves", _fifo(folder / "metrics.csv"))


# one dataset, two scales: one normalisation cannot fit 8-bit and 16-bit pixels at once

_data_case("dataset: one 16-bit image among 8-bit ones", lambda d: _replace_image(d, "s0.tif", lambda p: write_tiff(
    p, scene(0)[0].astype(np.uint16) * 39)), "s0.tif", "pixel type uint16", "uint8", commands=("train", "check"))
