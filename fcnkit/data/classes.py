"""Class tables: each class's id, name and display colour, plus the ignore value for unlabelled pixels.

A dataset folder describes its classes in ``classes.toml``::

    ignore = 255                 # mask value of unlabelled pixels (optional, default 255)
    ignore_color = "#000000"     # colour of unlabelled pixels in RGB masks and palettes (optional)

    [[classes]]
    id = 0
    name = "open ground"
    color = "#b59c70"            # or [181, 156, 112]

Ids run 0..K-1; ids, names and colours are unique. The same table travels in model-file metadata as a
JSON-able dict (``to_dict`` / ``from_dict``). An optional ``[vector_labels]`` table says where a dataset's labels
drawn as polygons, lines or points are (read by :mod:`fcnkit.data.vectors`).
"""

from __future__ import annotations

import colorsys
import tomllib
from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from fcnkit.atomic import write_text_atomic
from fcnkit.errors import DataError
from fcnkit.inputfiles import not_regular

Color = tuple[int, int, int]


@dataclass(frozen=True)
class ClassInfo:
    """One class: its id in masks, a name and an RGB display colour."""

    id: int
    name: str
    color: Color


@dataclass(frozen=True)
class ClassTable:
    """The classes of a dataset or model; ``ignore`` marks unlabelled mask pixels (never a class id)."""

    classes: tuple[ClassInfo, ...]
    ignore: int = 255
    ignore_color: Color = (0, 0, 0)

    def __post_init__(self) -> None:
        problems = table_problems(self)
        if problems:
            raise DataError(f"class table: {problems[0]}")

    @property
    def ids(self) -> list[int]:
        return [c.id for c in self.classes]

    @property
    def names(self) -> list[str]:
        return [c.name for c in self.classes]

    @property
    def colors(self) -> list[Color]:
        return [c.color for c in self.classes]

    @property
    def num_classes(self) -> int:
        return len(self.classes)

    def palette(self) -> list[int]:
        """768 values for a PIL "P" image: index i shows class i's colour, the ignore value ``ignore_color``."""
        pal = [0] * 768
        pal[3 * self.ignore:3 * self.ignore + 3] = self.ignore_color
        for c in self.classes:
            pal[3 * c.id:3 * c.id + 3] = c.color
        return pal

    def to_dict(self) -> dict[str, Any]:
        return {
            "ignore": self.ignore,
            "ignore_color": _hex(self.ignore_color),
            "classes": [{"id": c.id, "name": c.name, "color": _hex(c.color)} for c in self.classes],
        }

    @classmethod
    def generic(cls, names: int | Sequence[str]) -> ClassTable:
        """A table for ``names`` (or that many classes, named "class 0", "class 1"…) with distinct display
        colours: the colour-blind-safe set of Okabe & Ito (2008), then hues a golden angle apart."""
        names = [f"class {i}" for i in range(names)] if isinstance(names, int) else list(names)
        return cls(tuple(ClassInfo(i, n, _generic_colour(i)) for i, n in enumerate(names)))

    @classmethod
    def from_dict(cls, d: Any, source: str = "class table") -> ClassTable:
        """Build a table from ``to_dict`` output or a parsed classes.toml; DataError names ``source`` and the key."""
        problems: list[str] = []
        table = _parse(d, problems)
        if table is not None:
            problems += table_problems(table)
        if problems:
            raise DataError(f"{source}: {problems[0]}")
        return _build(table)


_OKABE_ITO = ((230, 159, 0), (86, 180, 233), (0, 158, 115), (240, 228, 66), (0, 114, 178), (213, 94, 0),
              (204, 121, 167))


def _generic_colour(i: int) -> Color:
    if i < len(_OKABE_ITO):
        return _OKABE_ITO[i]
    r, g, b = colorsys.hsv_to_rgb((i * 0.618034) % 1.0, 0.65, 0.95 - 0.25 * (i % 2))
    return round(r * 255), round(g * 255), round(b * 255)


def table_problems(table: _RawTable | ClassTable) -> list[str]:
    """Every inconsistency in a table: ids not 0..K-1, duplicate ids/names/colours, a bad ignore value."""
    problems = []
    k = len(table.classes)
    if k == 0:
        problems.append("no classes (expected at least one [[classes]] entry)")
    if k > 255:
        problems.append(f"{k} classes (at most 255 fit in 8-bit masks)")
    for what, values in (("id", [c.id for c in table.classes]), ("name", [c.name for c in table.classes]),
                         ("color", [c.color for c in table.classes])):
        for v in sorted({v for v in values if values.count(v) > 1}, key=str):
            shown = _hex(v) if what == "color" else repr(v)
            problems.append(f"duplicate {what} {shown} (each class needs its own)")
    ids = sorted({c.id for c in table.classes})
    if ids != list(range(len(ids))):
        problems.append(f"class ids {ids} (expected 0..{len(ids) - 1} without gaps)")
    if not 0 <= table.ignore <= 255:
        problems.append(f"ignore = {table.ignore} (expected 0..255)")
    elif table.ignore < k:
        problems.append(f"ignore = {table.ignore} is a class id (expected a value ≥ {k}, e.g. 255)")
    if table.ignore_color in [c.color for c in table.classes]:
        problems.append(f"ignore_color {_hex(table.ignore_color)} is also a class colour (RGB masks would be "
                        "ambiguous)")
    return problems


@dataclass
class _RawTable:
    """A parsed but not yet validated table (so every problem can be listed, not just the first)."""

    classes: list[ClassInfo]
    ignore: int
    ignore_color: Color


def _parse(d: Any, problems: list[str]) -> _RawTable | None:
    if not isinstance(d, dict):
        problems.append(f"expected a table, got {type(d).__name__}")
        return None
    for key in sorted(set(d) - {"ignore", "ignore_color", "classes", "vector_labels"}):
        problems.append(f"unknown key {key!r} (expected ignore, ignore_color, classes, vector_labels)")
    ignore = d.get("ignore", 255)
    if not _is_int(ignore):
        problems.append(f"ignore = {ignore!r} (expected an integer 0..255)")
        ignore = 255
    ignore_color = _color(d.get("ignore_color", (0, 0, 0)), "ignore_color", problems) or (0, 0, 0)
    entries = d.get("classes")
    if not isinstance(entries, list):
        problems.append("missing [[classes]] entries (each with id, name and color)")
        return None
    classes = []
    for i, e in enumerate(entries):
        where = f"classes[{i}]"
        if not isinstance(e, dict):
            problems.append(f"{where}: expected a table with id, name and color")
            continue
        for key in sorted(set(e) - {"id", "name", "color"}):
            problems.append(f"{where}: unknown key {key!r} (expected id, name, color)")
        cid, name = e.get("id"), e.get("name")
        if not _is_int(cid):
            problems.append(f"{where}.id = {cid!r} (expected an integer 0..254)")
            continue
        if not isinstance(name, str) or not name.strip():
            problems.append(f"{where}.name = {name!r} (expected a non-empty string)")
            continue
        color = _color(e.get("color"), f"{where}.color", problems)
        if color is not None:
            classes.append(ClassInfo(int(cid), name, color))
    if len(classes) != len(entries):
        return None
    return _RawTable(classes, int(ignore), ignore_color)


def _build(raw: _RawTable | None) -> ClassTable:
    assert raw is not None
    return ClassTable(tuple(sorted(raw.classes, key=lambda c: c.id)), raw.ignore, raw.ignore_color)


def _is_int(v: Any) -> bool:
    return isinstance(v, int) and not isinstance(v, bool)


def _color(v: Any, where: str, problems: list[str]) -> Color | None:
    """An RGB triple from "#rrggbb" or [r, g, b]; None (and a problem) otherwise."""
    if isinstance(v, str) and len(v) == 7 and v[0] == "#":
        try:
            return (int(v[1:3], 16), int(v[3:5], 16), int(v[5:7], 16))
        except ValueError:
            pass
    elif isinstance(v, (list, tuple)) and len(v) == 3 and all(_is_int(x) and 0 <= x <= 255 for x in v):
        return (int(v[0]), int(v[1]), int(v[2]))
    problems.append(f"{where} = {v!r} (expected \"#rrggbb\" or [r, g, b] with values 0..255)")
    return None


def _hex(c: Color) -> str:
    return "#{:02x}{:02x}{:02x}".format(*c)


def read_classes_toml(path: str | Path) -> tuple[ClassTable | None, list[str]]:
    """Parse classes.toml and list every problem in it (used by ``load_classes`` and the dataset check)."""
    path = Path(path)
    special = not_regular(path)
    if special is not None:
        return None, [special]
    try:
        d = tomllib.loads(path.read_text(encoding="utf-8"))
    except FileNotFoundError:
        return None, [f"{path}: missing (expected a class table, see README 'Dataset folders')"]
    except (OSError, UnicodeDecodeError, tomllib.TOMLDecodeError) as e:
        return None, [f"{path}: not readable as TOML ({e})"]
    except RecursionError:
        return None, [f"{path}: not readable as TOML (arrays or tables nested too deeply)"]
    problems: list[str] = []
    raw = _parse(d, problems)
    if raw is not None:
        problems += table_problems(raw)
    if problems:
        return None, [f"{path}: {p}" for p in problems]
    return _build(raw), []


def load_classes(path: str | Path) -> ClassTable:
    """Read and validate a classes.toml; DataError (naming the file and key) on the first problem."""
    table, problems = read_classes_toml(path)
    if table is None:
        raise DataError(problems[0])
    return table


def classes_toml(table: ClassTable) -> str:
    """The TOML text of a class table (what ``load_classes`` reads back)."""
    lines = ["# fcnkit class table: mask value -> class name and display colour",
             f"ignore = {table.ignore}", f'ignore_color = "{_hex(table.ignore_color)}"']
    for c in table.classes:
        name = c.name.replace("\\", "\\\\").replace('"', '\\"')
        lines += ["", "[[classes]]", f"id = {c.id}", f'name = "{name}"', f'color = "{_hex(c.color)}"']
    return "\n".join(lines) + "\n"


def write_classes(path: str | Path, table: ClassTable) -> None:
    """Write ``table`` as classes.toml (atomically)."""
    write_text_atomic(path, classes_toml(table))
