"""The run journal: durable chunks, damage detection, one owner, no pickles (surfrec.batch.journal).

References: h5py reading the chunk files back (values and stored layout), and
HDF5's own decompression of the chunks copied into heights.h5.
"""

import hashlib
import json

import h5py
import numpy as np
import pytest

from surfrec.batch.journal import Journal
from surfrec.errors import InputError


def _chunk(n, shape, fill=1.0):
    return {"height": np.full((n, *shape), fill, np.float32), "uncertainty": np.zeros((n, *shape), np.float32),
            "flags": np.zeros(n, np.uint8), "time": np.arange(n, dtype=float), "coverage": np.ones(n),
            "valid_fraction": np.ones(n), "sigma_median_mm": np.ones(n), "info": json.dumps({"a": 1})}


def test_chunks_round_trip_and_count_as_done(tmp_path):
    j = Journal(tmp_path / "h.h5.journal")
    j.lock()
    j.start({"hashes": {"rig": "x"}})
    sha = j.write_chunk(3, _chunk(2, (4, 5), 2.5))
    assert sha == hashlib.sha256(j.chunk_path(3).read_bytes()).hexdigest()   # hashlib: the file's bytes
    j.accept_chunk(3, sha)
    assert j.done(10) == {3}
    c = j.read_chunk(3, 2, (4, 5))
    np.testing.assert_array_equal(c["height"], 2.5)
    assert json.loads(c["info"]) == {"a": 1} and j.read_info(3) == {"a": 1}
    assert j.read_manifest()["hashes"] == {"rig": "x"}
    assert not list(j.folder.glob(".*partial"))          # nothing half-written left behind
    with pytest.raises(InputError, match="shares"):
        j.accept_chunk(3, "0" * 64)                      # a file other than the one the worker wrote
    j.remove()
    assert not j.folder.exists()


def test_chunks_copy_into_heights_without_recompression(tmp_path):
    # h5py is the reference: the heights.h5 frames read back equal the chunk's,
    # and the stored (compressed) bytes are the chunk file's own.
    from surfrec.io.heightsfile import HeightsWriter

    j = Journal(tmp_path / "j")
    j.start({})
    rng = np.random.default_rng(1)
    a = _chunk(3, (40, 30))
    a["height"] = rng.normal(size=(3, 40, 30)).astype(np.float32)
    a["height"][1, :5] = np.nan
    j.write_chunk(0, a)
    w = HeightsWriter(tmp_path / "h.h5", np.arange(30.0), np.arange(40.0), attrs={"world_to_left_camera": np.eye(4)},
                      time_origin_iso=None, n_frames=3)
    with j.open_chunk(0, 3, (40, 30)) as c:
        w.append_block(c["time"], c["height"], c["uncertainty"], c["flags"])
        stored = c["height"].id.read_direct_chunk((2, 0, 0))
    w.close()
    with h5py.File(tmp_path / "h.h5", "r") as f:
        np.testing.assert_array_equal(f["height"][()], a["height"])
        np.testing.assert_array_equal(f["time"][()], a["time"])
        assert f["height"].id.read_direct_chunk((2, 0, 0)) == stored


def test_damaged_or_wrong_chunk_is_removed_and_reported(tmp_path):
    j = Journal(tmp_path / "j")
    j.start({})
    j.chunk_path(0).write_bytes(b"\x89HDF\r\n\x1a\n not really HDF5")
    with pytest.raises(InputError, match="damaged"):
        j.read_chunk(0, 2, (4, 5))
    assert 0 not in j.done(5)
    j.write_chunk(1, _chunk(3, (4, 5)))
    with pytest.raises(InputError, match="expected"):
        j.read_chunk(1, 2, (4, 5))                       # holds 3 frames, the plan says 2
    assert 1 not in j.done(5)


def test_crafted_chunk_files_are_refused(tmp_path):
    # A chunk file from elsewhere: another format stamp, an object-typed info, a
    # missing variable. Each is refused by name, never evaluated.
    j = Journal(tmp_path / "j")
    j.start({})
    j.write_chunk(0, _chunk(1, (2, 2)))
    with h5py.File(j.chunk_path(0), "a") as f:
        f.attrs["format"] = "something else"
    with pytest.raises(InputError, match="not a surfrec run chunk"):
        j.read_chunk(0, 1, (2, 2))
    j.write_chunk(0, _chunk(1, (2, 2)))
    with h5py.File(j.chunk_path(0), "a") as f:
        f.attrs["info"] = np.array([1, 2, 3])
    with pytest.raises(InputError, match="info"):
        j.read_chunk(0, 1, (2, 2))
    j.write_chunk(0, _chunk(1, (2, 2)))
    with h5py.File(j.chunk_path(0), "a") as f:
        del f["coverage"]
    with pytest.raises(InputError, match="damaged"):
        j.read_chunk(0, 1, (2, 2))


def test_one_run_owns_a_journal(tmp_path):
    a, b = Journal(tmp_path / "j"), Journal(tmp_path / "j")
    a.lock()
    with pytest.raises(InputError, match="another surfrec run"):
        b.lock()
    a.unlock()
    b.lock()
    b.unlock()


def test_manifest_that_is_not_ours_is_refused(tmp_path):
    j = Journal(tmp_path / "j")
    j.folder.mkdir()
    j.manifest_path.write_text('{"format": "something else"}')
    with pytest.raises(InputError, match="not a surfrec run journal"):
        j.read_manifest()
