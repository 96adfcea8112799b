"""heights.h5 (surfrec.io.heightsfile): the netCDF-4 / CF-1.10 contract, checked with outside readers.

References: xarray with the h5netcdf engine, the netCDF4 Python package (which
bundles the netCDF-C library) and ``ncdump -h`` from Debian's netcdf-bin
(installed by .ci/run) must open the file with time, y, x as coordinates and
their units (issue 5; docs/file-formats.md "heights.h5"). CF-1.10 (cfconventions.org):
time units "seconds since <date>", flag_masks / flag_meanings for bit fields,
_FillValue of the variable's type.
"""

import json
import shutil
import subprocess

import h5py
import numpy as np
import pytest

from surfrec.errors import InputError
from surfrec.io.heightsfile import FLAG_MEANINGS, FLAG_VALUES, HeightsWriter, read_heights, time_units, write_heights


@pytest.fixture(scope="module")
def sample(tmp_path_factory):
    rng = np.random.default_rng(5)
    x = np.arange(-20.0, 20.01, 2.0)
    y = np.arange(-10.0, 10.01, 2.5)
    t = np.arange(4) / 500.0
    h = rng.normal(0, 1, (4, y.size, x.size)).astype(np.float32)
    h[:, 0, 0] = np.nan
    s = np.full(h.shape, 0.01, np.float32)
    m = np.eye(4)
    m[:3, 3] = [1.0, 2.0, 900.0]
    attrs = {"world_to_left_camera": m.ravel(), "history": "surfrec heights d.h5 -o h.h5",
             "rig_json": json.dumps({"format": "surfrec.rig", "note": "µ" * 50_000}), "rig_sha256": "ab" * 32,
             "grid_step_mm": 2.0, "still_correction": True, "extent_mm": [-20.0, 20.0, -10.0, 10.0],
             "nested": {"a": [1, 2]}}
    path = tmp_path_factory.mktemp("heightsfile") / "h.h5"
    fp = np.ones((y.size, x.size), bool)
    fp[-1, -1] = False
    write_heights(path, x, y, t, h, s, [0, 4, 0, 16], attrs, time_origin_iso="2025-03-04T05:06:07+01:00",
                  footprint=fp)
    return dict(path=path, x=x, y=y, t=t, h=h, s=s, m=m, fp=fp)


def test_round_trip(sample):
    r = read_heights(sample["path"])
    np.testing.assert_array_equal(r["x"], sample["x"])
    np.testing.assert_array_equal(r["y"], sample["y"])
    np.testing.assert_array_equal(r["time"], sample["t"])
    np.testing.assert_array_equal(r["height"], sample["h"])
    np.testing.assert_array_equal(r["height_uncertainty"], sample["s"])
    np.testing.assert_array_equal(r["frame_flags"], [0, 4, 0, 16])
    np.testing.assert_array_equal(r["footprint"], sample["fp"])
    np.testing.assert_array_equal(r["attrs"]["world_to_left_camera"], sample["m"])
    assert r["attrs"]["format"] == "surfrec.heights" and r["attrs"]["version"] == 1
    assert r["attrs"]["Conventions"] == "CF-1.10"
    assert r["attrs"]["still_correction"] == 1 and json.loads(r["attrs"]["nested"]) == {"a": [1, 2]}
    assert json.loads(r["attrs"]["rig_json"])["note"] == "µ" * 50_000   # long text (> 64 KiB) survives
    # The origin is given in UTC, in the form udunits and cftime parse.
    assert r["time_units"] == "seconds since 2025-03-04 04:06:07"
    r2 = read_heights(sample["path"], frames=slice(1, 3))
    np.testing.assert_array_equal(r2["height"], sample["h"][1:3])


def test_layout_chunks_filters_and_scales(sample):
    # docs/conventions.md: chunked by frame, HDF5 built-in filters only; dimension scales for time, y, x.
    with h5py.File(sample["path"], "r") as f:
        ds = f["height"]
        assert ds.chunks[0] == 1 and ds.compression == "gzip" and ds.shuffle
        assert [d.label or list(d.keys())[0] for d in ds.dims] == ["time", "y", "x"]
        assert f["time"].is_scale and f["x"].is_scale and f["y"].is_scale
        assert f["time"].maxshape == (None,)
        for name, a in f.attrs.items():  # netCDF attributes are 1-D and small
            v = np.asarray(a)
            assert v.ndim <= 1 and (v.dtype.kind in "SOU" or v.size <= 256), name


def test_xarray_h5netcdf_opens_with_labelled_coordinates(sample):
    # Reference: xarray + h5netcdf (a pure-Python netCDF-4 reader on h5py).
    import xarray as xr

    with xr.open_dataset(sample["path"], engine="h5netcdf") as ds:
        assert set(ds.coords) >= {"time", "y", "x"}
        assert ds["height"].dims == ("time", "y", "x")
        assert ds["x"].attrs["units"] == "mm" and ds["y"].attrs["units"] == "mm"
        assert ds["height"].attrs["units"] == "mm"
        assert ds["height_uncertainty"].attrs["units"] == "mm"
        # CF time decoded: 2 ms steps from the origin.
        assert str(ds["time"].values[0]).startswith("2025-03-04T04:06:07")
        np.testing.assert_allclose(np.diff(ds["time"].values).astype("timedelta64[us]").astype(float), 2000.0)
        assert np.isnan(ds["height"].values[0, 0, 0])
        np.testing.assert_array_equal(ds["height"].values, sample["h"])
        assert ds["frame_flags"].attrs["flag_meanings"] == FLAG_MEANINGS
        assert ds.attrs["Conventions"] == "CF-1.10"
    with xr.open_dataset(sample["path"], engine="h5netcdf", decode_times=False) as ds:
        assert ds["time"].attrs["units"] == "seconds since 2025-03-04 04:06:07"


def test_netcdf4_python_opens_it(sample):
    # Reference: the netCDF4 Python package (it bundles the netCDF-C library).
    import netCDF4

    with netCDF4.Dataset(sample["path"]) as ds:
        assert list(ds.dimensions) == ["time", "y", "x"]
        assert ds.dimensions["time"].isunlimited()
        assert ds["height"].dimensions == ("time", "y", "x")
        for name, units in (("x", "mm"), ("y", "mm"), ("height", "mm"), ("height_uncertainty", "mm")):
            assert ds[name].units == units
        assert ds["time"].units.startswith("seconds since 2025-03-04")
        dates = netCDF4.num2date(ds["time"][:], ds["time"].units, ds["time"].calendar)
        assert (dates[0].hour, dates[0].minute, dates[0].second) == (4, 6, 7)
        np.testing.assert_array_equal(ds["frame_flags"].flag_masks, FLAG_VALUES)
        assert ds["frame_flags"].flag_masks.dtype == np.uint8  # CF: same type as the variable
        assert np.isnan(ds["height"]._FillValue)
        h = ds["height"][:]
        assert h.mask[0, 0, 0] and not h.mask[0, 1, 1]
        assert len(ds.world_to_left_camera) == 16
        assert ds.history == "surfrec heights d.h5 -o h.h5"


def test_ncdump_lists_the_same_dimensions_and_attributes(sample):
    # Reference: ncdump -h from Debian's netcdf-bin (the C library's own dump).
    if shutil.which("ncdump") is None:
        pytest.skip("ncdump not installed (Debian: apt-get install netcdf-bin; .ci/run installs it)")
    out = subprocess.run(["ncdump", "-h", str(sample["path"])], capture_output=True, text=True)
    assert out.returncode == 0, out.stderr
    text = out.stdout
    assert "time = UNLIMITED ; // (4 currently)" in text
    assert f"y = {sample['y'].size} ;" in text and f"x = {sample['x'].size} ;" in text
    assert "float height(time, y, x) ;" in text and "float height_uncertainty(time, y, x) ;" in text
    assert 'height:units = "mm" ;' in text and 'x:units = "mm" ;' in text
    assert 'time:units = "seconds since 2025-03-04 04:06:07" ;' in text
    assert ':Conventions = "CF-1.10" ;' in text
    assert "frame_flags:flag_masks = 1UB, 2UB, 4UB, 8UB, 16UB ;" in text
    assert ":world_to_left_camera = 1., 0., 0., 1., 0., 1., 0., 2., 0., 0., 1., 900., 0., 0., 0., 1. ;" in text


def test_writer_refuses_bad_input_and_leaves_no_partial_file(tmp_path):
    x, y = np.arange(3.0), np.arange(2.0)
    with pytest.raises(ValueError, match="world_to_left_camera"):
        HeightsWriter(tmp_path / "a.h5", x, y, attrs={}, time_origin_iso=None, n_frames=1)
    w = HeightsWriter(tmp_path / "b.h5", x, y, attrs={"world_to_left_camera": np.eye(4).ravel()},
                      time_origin_iso=None, n_frames=2)
    w.append(0.0, np.zeros((2, 3)), np.zeros((2, 3)), 0)
    with pytest.raises(ValueError, match="expected"):
        w.append(0.002, np.zeros((3, 2)), np.zeros((3, 2)), 0)
    assert not (tmp_path / "b.h5").exists()       # nothing published before close()
    w.abort()
    assert list(tmp_path.iterdir()) == []
    with pytest.raises(ValueError, match="too many"):
        write_heights(tmp_path / "c.h5", x, y, [0.0], np.zeros((1, 2, 3)), np.zeros((1, 2, 3)), None,
                      {"world_to_left_camera": np.eye(4).ravel(), "big": np.arange(1000.0)})
    assert list(tmp_path.iterdir()) == []
    with pytest.raises(InputError, match="ISO 8601"):
        time_units("yesterday")


def test_reader_names_the_problem(tmp_path):
    p = tmp_path / "x.h5"
    with h5py.File(p, "w") as f:
        f.attrs["format"] = "surfrec.disparity"
    with pytest.raises(InputError, match="not a surfrec heights file"):
        read_heights(p)
    with pytest.raises(InputError, match="does not exist"):
        read_heights(tmp_path / "missing.h5")
