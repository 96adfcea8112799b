"""datum.h5: round trip, the layout docs/file-formats.md fixes, validation that names the key, atomic writing.

References: the datum.h5 contract of docs/file-formats.md (root attributes
world_to_left_camera as 16 row-major values, plane as [nx, ny, nz, d],
fit_rms_mm, n_frames, the rig's SHA-256; datasets u, v, disparity, valid,
still_residual on residual_x, residual_y), read back with h5py, the HDF5
reference library's Python binding, independently of our reader.
"""

import json
import subprocess
import sys

import h5py
import numpy as np
import pytest

from surfrec.errors import InputError
from surfrec.geometry.datum import Datum, datum_frame
from surfrec.io.datumfile import read_datum, write_datum

SHA = "ab" * 32


def make_datum():
    rng = np.random.default_rng(0)
    n = np.array([0.139, 0.0027, -0.99])
    n /= np.linalg.norm(n)
    m = datum_frame(n, -902.0, origin=(10.0, -5.0), rotate_deg=20.0)
    u = np.arange(11.0, 500.0, 4.0)
    v = np.arange(11.0, 370.0, 4.0)
    disp = 3.0 + 0.004 * u[None, :] + 0.0 * v[:, None] + rng.normal(0, 0.003, (v.size, u.size))
    valid = np.ones(disp.shape, bool)
    valid[40:50, 60:70] = False
    disp[~valid] = np.nan
    noise = np.where(valid, 0.012 + rng.normal(0, 0.002, disp.shape) ** 2, np.nan)
    rx = np.arange(-160.0, 162.0, 2.0)
    ry = np.arange(-120.0, 124.0, 2.0)
    res = 1e-3 * np.outer(np.cos(ry / 50), np.sin(rx / 60))
    res[:2, :3] = np.nan
    return Datum(world_to_left_camera=m, plane_normal=m[:3, 2].copy(), plane_offset=float(m[:3, 2] @ m[:3, 3]),
                 u=u, v=v, disparity=disp, valid=valid, residual_x=rx, residual_y=ry, still_residual=res,
                 noise_floor=noise, fit_rms_mm=0.0145, n_frames=3, rig_sha256=SHA,
                 attrs={"software": "surfrec test", "window_px": 15, "spacing_px": 4, "origin_mm": [10.0, -5.0],
                        "rotate_deg": 20.0, "left_images": "still/left", "flag": True},
                 point_residual=np.where(valid, 0.001, np.nan))


def test_round_trip(tmp_path):
    d = make_datum()
    p = tmp_path / "datum.h5"
    write_datum(p, d)
    r = read_datum(p)
    for key in ("world_to_left_camera", "plane_normal", "u", "v", "disparity", "valid", "residual_x", "residual_y",
                "still_residual", "noise_floor", "point_residual"):
        np.testing.assert_array_equal(getattr(r, key), getattr(d, key), err_msg=key)
    assert r.plane_offset == d.plane_offset and r.fit_rms_mm == d.fit_rms_mm
    assert r.n_frames == 3 and r.rig_sha256 == SHA
    assert r.attrs["window_px"] == 15 and r.attrs["origin_mm"] == [10.0, -5.0]
    assert r.attrs["left_images"] == "still/left" and r.attrs["flag"] == 1
    assert r.valid.dtype == bool
    # The methods agree with the matrix: a datum-frame point goes to the camera and back.
    pts = np.array([[1.0, 2.0, 3.0], [-50.0, 20.0, -1.0]])
    np.testing.assert_allclose(r.to_datum_frame(r.to_left_camera(pts)), pts, atol=1e-9)
    assert r.still_residual_at(0.0, 0.0) == pytest.approx(0.0, abs=1e-12)
    assert np.isnan(r.still_residual_at(-159.0, -119.0)) and np.isnan(r.still_residual_at(1000.0, 0.0))


def test_layout_is_the_design_contract(tmp_path):
    d = make_datum()
    p = tmp_path / "datum.h5"
    write_datum(p, d)
    with h5py.File(p, "r") as f:
        a = f.attrs
        assert a["format"] == "surfrec.datum" and a["version"] == 1
        np.testing.assert_array_equal(a["world_to_left_camera"], d.world_to_left_camera.ravel())  # row-major
        np.testing.assert_array_equal(a["plane"], [*d.plane_normal, d.plane_offset])
        assert a["fit_rms_mm"] == 0.0145 and a["n_frames"] == 3 and a["rig_sha256"] == SHA
        assert f["disparity"].shape == (d.v.size, d.u.size)
        assert f["still_residual"].shape == (d.residual_y.size, d.residual_x.size)
        assert f["disparity"].attrs["units"] == "px" and f["still_residual"].attrs["units"] == "mm"
        for key in ("u", "v", "disparity", "valid", "noise_floor", "residual_x", "residual_y", "still_residual"):
            assert key in f
        # Attributes stay netCDF-friendly: scalars, strings and 1-D arrays only.
        assert all(np.ndim(a[k]) <= 1 for k in a)


def _corrupt(tmp_path, edit):
    p = tmp_path / "datum.h5"
    write_datum(p, make_datum())
    with h5py.File(p, "a") as f:
        edit(f)
    return p


@pytest.mark.parametrize("edit, message", [
    (lambda f: f.attrs.__setitem__("format", "surfrec.rig"), "'format' is 'surfrec.rig'"),
    (lambda f: f.attrs.__setitem__("version", 2), "'version' is 2"),
    (lambda f: f.attrs.__delitem__("plane"), "missing attribute 'plane'"),
    (lambda f: f.attrs.__setitem__("world_to_left_camera", np.zeros(12)), "'world_to_left_camera' holds 12 values"),
    (lambda f: f.attrs.__setitem__("world_to_left_camera", np.full(16, np.nan)), "'world_to_left_camera' holds NaN"),
    (lambda f: f.attrs.__setitem__("world_to_left_camera", (2 * np.eye(4)).ravel()), "not a rigid transform"),
    (lambda f: f.attrs.__setitem__("plane", [0.0, 0.0, 1.0, -902.0]), "'plane' disagrees"),
    (lambda f: f.attrs.__setitem__("rig_sha256", "abc"), "'rig_sha256'"),
    (lambda f: f.attrs.__setitem__("n_frames", 0), "'n_frames'"),
    (lambda f: f.__delitem__("still_residual"), "missing dataset 'still_residual'"),
    (lambda f: (f.__delitem__("disparity"), f.create_dataset("disparity", data=np.zeros((3, 3)))),
     "'disparity' has shape (3, 3)"),
    (lambda f: f["disparity"].__setitem__((0, 0), np.nan), "'disparity' is not finite at points marked valid"),
    (lambda f: f["disparity"].__setitem__((45, 65), 1.0), "points marked invalid"),
    (lambda f: f["u"].__setitem__(3, 0.0), "'u' must be finite and strictly increasing"),
    (lambda f: f["still_residual"].__setitem__((5, 5), np.inf), "'still_residual'"),
])
def test_validation_names_the_key(tmp_path, edit, message):
    p = _corrupt(tmp_path, edit)
    with pytest.raises(InputError) as err:
        read_datum(p)
    assert message in str(err.value) and str(p) in str(err.value)


def test_not_a_datum_file(tmp_path):
    with pytest.raises(InputError, match="does not exist"):
        read_datum(tmp_path / "nope.h5")
    (tmp_path / "text.h5").write_text("not hdf5")
    with pytest.raises(InputError, match="not a readable HDF5 file"):
        read_datum(tmp_path / "text.h5")


def test_writing_is_atomic(tmp_path):
    p = tmp_path / "datum.h5"
    write_datum(p, make_datum())
    before = p.read_bytes()
    bad = make_datum()
    bad.attrs = {"nested": {"a": 1}}  # not storable: the write fails part way
    with pytest.raises(TypeError):
        write_datum(p, bad)
    assert p.read_bytes() == before                    # the old file is untouched
    assert sorted(x.name for x in tmp_path.iterdir()) == ["datum.h5"]  # no partial file left


def test_inspect_summarises_a_datum(tmp_path):
    p = tmp_path / "datum.h5"
    write_datum(p, make_datum())
    res = subprocess.run([sys.executable, "-m", "surfrec.cli.main", "inspect", str(p), "--json"],
                         capture_output=True, text=True)
    assert res.returncode == 0, res.stderr
    s = json.loads(res.stdout)
    assert s["format"] == "surfrec.datum" and s["n_frames"] == 3 and s["rig_sha256"] == SHA
    assert s["fit_rms_mm"] == pytest.approx(0.0145)
    assert s["grid"]["valid"] == make_datum().valid.sum()
