"""embed.files: outputs appear whole or not at all."""

import pytest

from embed.files import atomic, temp_path, write_json


def test_temp_name_is_hidden_beside_and_keeps_the_format_suffix(tmp_path):
    t = temp_path(tmp_path / "map.nii.gz")
    assert t.parent == tmp_path and t.name.startswith(".map.partial-") and t.name.endswith(".nii.gz")
    assert temp_path(tmp_path / "notes.txt").name.startswith(".notes.txt.partial-")


def test_failure_leaves_the_old_file_and_no_temporary(tmp_path):
    target = tmp_path / "a.json"
    write_json(target, {"v": 1})
    with pytest.raises(RuntimeError, match="boom"):
        with atomic(target) as tmp:
            tmp.write_text("half")
            raise RuntimeError("boom")
    assert target.read_text() == '{\n "v": 1\n}'
    assert [p.name for p in tmp_path.iterdir()] == ["a.json"]
