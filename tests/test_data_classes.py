"""Class tables: classes.toml round trips, validation messages, palettes checked through Pillow."""

from __future__ import annotations

import numpy as np
import pytest
from PIL import Image

from fcnkit.data.classes import ClassInfo, ClassTable, classes_toml, load_classes, read_classes_toml, write_classes
from fcnkit.errors import DataError

TABLE = ClassTable((ClassInfo(0, "soil", (120, 90, 40)), ClassInfo(1, "crop", (20, 200, 30)),
                    ClassInfo(2, "pond", (0, 60, 250))), ignore=255)


def test_toml_and_dict_round_trip(tmp_path):
    path = tmp_path / "classes.toml"
    write_classes(path, TABLE)
    assert load_classes(path) == TABLE
    assert ClassTable.from_dict(TABLE.to_dict()) == TABLE
    assert (TABLE.ids, TABLE.names, TABLE.num_classes) == ([0, 1, 2], ["soil", "crop", "pond"], 3)


def test_list_colours_and_defaults(tmp_path):
    path = tmp_path / "classes.toml"
    path.write_text('[[classes]]\nid = 1\nname = "b"\ncolor = [1, 2, 3]\n\n'
                    '[[classes]]\nid = 0\nname = "a"\ncolor = "#FF0000"\n')
    table = load_classes(path)
    assert table.names == ["a", "b"]  # sorted by id
    assert table.colors == [(255, 0, 0), (1, 2, 3)]
    assert (table.ignore, table.ignore_color) == (255, (0, 0, 0))


def test_palette_shows_class_colours_in_pillow():
    # Reference: Pillow's own palette lookup (P → RGB conversion) must show each id in its class colour.
    ids = np.array([[0, 1, 2, 255]], np.uint8)
    im = Image.fromarray(ids).convert("P")
    im.putpalette(TABLE.palette())
    rgb = np.asarray(im.convert("RGB"))[0]
    assert len(TABLE.palette()) == 768
    assert [tuple(int(v) for v in px) for px in rgb] == [*TABLE.colors, (0, 0, 0)]


BAD_TABLES = {
    "duplicate id": ('[[classes]]\nid = 0\nname = "a"\ncolor = "#000001"\n'
                     '[[classes]]\nid = 0\nname = "b"\ncolor = "#000002"\n', "duplicate id 0"),
    "duplicate name": ('[[classes]]\nid = 0\nname = "a"\ncolor = "#000001"\n'
                       '[[classes]]\nid = 1\nname = "a"\ncolor = "#000002"\n', "duplicate name 'a'"),
    "duplicate colour": ('[[classes]]\nid = 0\nname = "a"\ncolor = "#000001"\n'
                         '[[classes]]\nid = 1\nname = "b"\ncolor = [0, 0, 1]\n', "duplicate color #000001"),
    "gap in ids": ('[[classes]]\nid = 0\nname = "a"\ncolor = "#000001"\n'
                   '[[classes]]\nid = 2\nname = "b"\ncolor = "#000002"\n', "class ids [0, 2]"),
    "ignore is a class": ('ignore = 1\n[[classes]]\nid = 0\nname = "a"\ncolor = "#000001"\n'
                          '[[classes]]\nid = 1\nname = "b"\ncolor = "#000002"\n', "ignore = 1 is a class id"),
    "bad colour": ('[[classes]]\nid = 0\nname = "a"\ncolor = "red"\n', "classes[0].color = 'red'"),
    "unknown key": ('[[classes]]\nid = 0\nname = "a"\ncolor = "#000001"\ncolour = 3\n', "unknown key 'colour'"),
    "no classes": ("ignore = 255\n", "missing [[classes]]"),
    "not toml": ("[[classes]\n", "not readable as TOML"),
    "ignore colour clash": ('ignore_color = "#000001"\n[[classes]]\nid = 0\nname = "a"\ncolor = "#000001"\n',
                            "ignore_color #000001 is also a class colour"),
}


@pytest.mark.parametrize("case", sorted(BAD_TABLES))
def test_bad_tables_name_the_file_and_the_problem(tmp_path, case):
    text, expected = BAD_TABLES[case]
    path = tmp_path / "classes.toml"
    path.write_text(text)
    with pytest.raises(DataError) as e:
        load_classes(path)
    msg = str(e.value)
    assert str(path) in msg and expected in msg and "\n" not in msg


def test_every_problem_is_listed(tmp_path):
    path = tmp_path / "classes.toml"
    path.write_text('[[classes]]\nid = 0\nname = "a"\ncolor = "#000001"\n'
                    '[[classes]]\nid = 0\nname = "a"\ncolor = "#000001"\n')
    table, problems = read_classes_toml(path)
    assert table is None
    assert len(problems) == 3 and all(p.startswith(str(path)) for p in problems)


def test_missing_file_and_from_dict_errors(tmp_path):
    with pytest.raises(DataError, match="classes.toml: missing"):
        load_classes(tmp_path / "classes.toml")
    with pytest.raises(DataError, match="model metadata: duplicate id 0"):
        ClassTable.from_dict({"classes": [{"id": 0, "name": "a", "color": "#000000"},
                                          {"id": 0, "name": "b", "color": "#000001"}], "ignore_color": "#ffffff"},
                             source="model metadata")


def test_quoted_names_survive(tmp_path):
    table = ClassTable((ClassInfo(0, 'say "hi" \\ there', (1, 1, 1)),))
    path = tmp_path / "classes.toml"
    path.write_text(classes_toml(table))
    assert load_classes(path) == table
