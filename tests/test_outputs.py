"""Output safety: never overwrite without --force; a failed write leaves nothing that looks complete.

Reference: POSIX rename(2) replaces the target atomically within one file system (common practice
for crash-safe writes).
"""

import pytest

from surfrec.errors import InputError
from surfrec.io.outputs import atomic_file, atomic_folder, check_output


def test_check_output_refuses_existing_without_force(tmp_path):
    f = tmp_path / "out.h5"
    f.write_text("old")
    with pytest.raises(InputError, match="already exists; use --force"):
        check_output(f, force=False)
    assert check_output(f, force=True) == f
    with pytest.raises(InputError, match="does not exist"):
        check_output(tmp_path / "nope" / "out.h5", force=False)
    empty = tmp_path / "empty"
    empty.mkdir()
    assert check_output(empty, force=False, kind="folder") == empty


def test_atomic_file_keeps_old_content_on_failure(tmp_path):
    f = tmp_path / "out.txt"
    f.write_text("old")
    with pytest.raises(RuntimeError):
        with atomic_file(f) as tmp:
            tmp.write_text("half")
            raise RuntimeError("disk full")
    assert f.read_text() == "old"
    assert [p.name for p in tmp_path.iterdir()] == ["out.txt"]
    with atomic_file(f) as tmp:
        tmp.write_text("new")
    assert f.read_text() == "new"


def test_atomic_folder_appears_only_when_complete(tmp_path):
    out = tmp_path / "session"
    with pytest.raises(KeyboardInterrupt):
        with atomic_folder(out, force=False) as tmp:
            (tmp / "a.png").write_text("x")
            raise KeyboardInterrupt
    assert not out.exists() and list(tmp_path.iterdir()) == []
    with atomic_folder(out, force=False) as tmp:
        (tmp / "a.png").write_text("x")
    assert (out / "a.png").read_text() == "x"
    # Replacing needs force, and the old folder survives until the new one is complete.
    with pytest.raises(RuntimeError):
        with atomic_folder(out, force=True) as tmp:
            (tmp / "b.png").write_text("y")
            raise RuntimeError
    assert (out / "a.png").exists() and not (out / "b.png").exists()
    with atomic_folder(out, force=True) as tmp:
        (tmp / "b.png").write_text("y")
    assert sorted(p.name for p in out.iterdir()) == ["b.png"]
    assert sorted(p.name for p in tmp_path.iterdir()) == ["session"]
