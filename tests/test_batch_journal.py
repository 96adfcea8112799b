"""The run journal: durable chunks, damage detection, one owner, no pickles (surfrec.batch.journal)."""

import json

import numpy as np
import pytest

from surfrec.batch.journal import Journal
from surfrec.errors import InputError


def _chunk(n, shape, fill=1.0):
    return {"height": np.full((n, *shape), fill, np.float32), "uncertainty": np.zeros((n, *shape), np.float32),
            "flags": np.zeros(n, np.uint8), "time": np.arange(n, dtype=float), "coverage": np.ones(n),
            "valid_fraction": np.ones(n), "sigma_median_mm": np.ones(n), "info": np.array(json.dumps({"a": 1}))}


def test_chunks_round_trip_and_count_as_done(tmp_path):
    j = Journal(tmp_path / "h.h5.journal")
    j.lock()
    j.start({"hashes": {"rig": "x"}})
    j.write_chunk(3, _chunk(2, (4, 5), 2.5))
    assert j.done(10) == {3}
    c = j.read_chunk(3, 2, (4, 5))
    np.testing.assert_array_equal(c["height"], 2.5)
    assert json.loads(str(c["info"])) == {"a": 1}
    assert j.read_manifest()["hashes"] == {"rig": "x"}
    assert not list(j.folder.glob("*.partial"))          # nothing half-written left behind
    j.remove()
    assert not j.folder.exists()


def test_damaged_or_wrong_chunk_is_removed_and_reported(tmp_path):
    j = Journal(tmp_path / "j")
    j.start({})
    j.chunk_path(0).write_bytes(b"PK\x03\x04 not really a zip")
    with pytest.raises(InputError, match="damaged"):
        j.read_chunk(0, 2, (4, 5))
    assert 0 not in j.done(5)
    j.write_chunk(1, _chunk(3, (4, 5)))
    with pytest.raises(InputError, match="expected"):
        j.read_chunk(1, 2, (4, 5))                       # holds 3 frames, the plan says 2


def test_object_arrays_are_never_unpickled(tmp_path):
    # numpy's own rule (allow_pickle=False) is the reference: an object array in a
    # crafted chunk file must not load.
    j = Journal(tmp_path / "j")
    j.start({})
    bad = _chunk(1, (2, 2))
    bad["info"] = np.array([{"evil": 1}], dtype=object)
    np.savez(j.chunk_path(0), **bad)
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
