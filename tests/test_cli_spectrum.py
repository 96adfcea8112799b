"""`surfrec spectrum` as a user calls it: outputs, the dispersion check, exit codes and messages.

References: scipy.signal.welch for the Welch spectrum; the linear
capillary-gravity dispersion relation (Lamb, Hydrodynamics; Lighthill, Waves
in Fluids) for the measured wavenumber, within 1% on the rendered quick
plane session (a plain plane wave, the check issue 7 asks for) and on the
rendered quick scatter session (its incident plane wave; the scattered waves
share its |k|).
"""

import csv
import json

import numpy as np
import pytest
from scipy import signal

from surfrec.waves import wavenumber
from wave_heights import write_field
from cli_run import run

F = 7.0
X = np.arange(-60, 60.01, 2.0)
Y = np.arange(-40, 40.01, 2.0)


@pytest.fixture(scope="module")
def plane(tmp_path_factory):
    work = tmp_path_factory.mktemp("spectrum-cli")
    k = float(wavenumber(F, 60.0))
    xx, yy = np.meshgrid(X, Y)
    amp = 0.5 * np.exp(1j * k * (np.cos(0.3) * xx + np.sin(0.3) * yy))
    t = np.arange(64) / 50.0
    path = write_field(work / "plane.h5", X, Y, t, amp, F, noise_mm=0.01)
    gappy = write_field(work / "gappy.h5", X, Y, np.r_[t[:20], t[21:]], amp, F)
    short = write_field(work / "short.h5", X, Y, t[:6], amp, F)
    return dict(work=work, path=path, gappy=gappy, short=short, k=k)


def _rows(p):
    with open(p) as fh:
        return list(csv.DictReader(fh))


def test_plane_wave_peak_and_dispersion(plane):
    out = plane["work"] / "out"
    res = run("spectrum", plane["path"], "-o", out, "--depth", 60)
    assert res.returncode == 0, res.stderr
    for name in ("spectrum.png", "frequency_wavenumber.png", "spectrum.csv", "peaks.csv", "report.json"):
        assert (out / name).stat().st_size > 0
    peaks = _rows(out / "peaks.csv")
    assert abs(float(peaks[0]["frequency_hz"]) - F) < 0.05
    # Against the dispersion relation (Lamb; Lighthill), at the measured peak frequency.
    assert abs(float(peaks[0]["relative_error"])) < 0.005
    assert abs(float(peaks[0]["direction_deg"]) - np.degrees(0.3)) < 0.5
    rep = json.loads((out / "report.json").read_text())
    assert rep["welch"]["nperseg"] == 64 and rep["frames"]["gap_note"] is None
    # Existing output: refused without --force.
    res = run("spectrum", plane["path"], "-o", out)
    assert res.returncode == 2 and "--force" in res.stderr


def test_point_spectrum_matches_scipy_welch(plane):
    out = plane["work"] / "point"
    res = run("spectrum", plane["path"], "-o", out, "--point", "10,-4", "--segment", "32")
    assert res.returncode == 0, res.stderr
    from surfrec.io.heightsfile import read_heights

    d = read_heights(plane["path"])
    series = d["height"][:, list(Y).index(-4.0), list(X).index(10.0)].astype(np.float64)
    f_ref, p_ref = signal.welch(series, fs=50.0, nperseg=32)   # reference: scipy.signal.welch
    rows = _rows(out / "spectrum.csv")
    np.testing.assert_allclose([float(r["frequency_hz"]) for r in rows], f_ref, atol=1e-9)
    np.testing.assert_allclose([float(r["psd_mm2_per_hz"]) for r in rows], p_ref, rtol=1e-6)


def test_gaps_use_the_longest_even_stretch(plane):
    out = plane["work"] / "gappy"
    res = run("spectrum", plane["gappy"], "-o", out)
    assert res.returncode == 0, res.stderr
    assert "longest evenly sampled stretch, frames 20 to 62" in res.stderr
    assert json.loads((out / "report.json").read_text())["frames"]["used"] == 43


@pytest.mark.parametrize("args, message", [
    (["--point", "500,0"], "lies outside the grid"),
    (["--area", "200,300,0,10"], "holds no grid node"),
    (["--point", "0,0", "--area", "0,1,0,1"], "not both"),
    (["--segment", "1000"], "longer than"),
])
def test_bad_input_gives_one_line_and_status_2(plane, args, message):
    res = run("spectrum", plane["path"], "-o", plane["work"] / "bad", *args)
    assert res.returncode == 2
    assert message in res.stderr and len(res.stderr.strip().splitlines()) == 1 and "Traceback" not in res.stderr


def test_short_record_is_refused(plane):
    res = run("spectrum", plane["short"], "-o", plane["work"] / "bad2")
    assert res.returncode == 2 and "needs at least 8" in res.stderr


def test_rendered_scatter_session_follows_dispersion(scatter_heights, tmp_path):
    # The quick scatter session: 5 Hz, 60 mm deep water (its SCENARIO.md); measured |k| within 1% of the
    # dispersion relation (Lamb; Lighthill) on heights reconstructed from the rendered stereo images.
    heights, _ = scatter_heights
    res = run("spectrum", heights, "-o", tmp_path / "s", "--depth", 60)
    assert res.returncode == 0, res.stderr
    peak = _rows(tmp_path / "s" / "peaks.csv")[0]
    assert abs(float(peak["frequency_hz"]) - 5.0) < 0.05
    assert abs(float(peak["relative_error"])) < 0.01, peak


def test_rendered_plane_session_follows_dispersion(plane_heights, tmp_path):
    # The quick plane session: a 4 Hz plane wave on water 60 mm deep (its truth.h5), rendered and reconstructed
    # through datum, match and heights. Measured |k| at the wave frequency within 1% of the linear
    # capillary-gravity relation (Lamb, Hydrodynamics; Lighthill, Waves in Fluids) with the handbook g and sigma.
    from surfrec.io.truthfile import read_truth
    from surfrec.waves import water

    heights, session = plane_heights
    t = read_truth(session / "truth.h5")
    surface = t["groups"]["waves"]["surface"]
    surface = json.loads(surface) if isinstance(surface, str) else surface
    f, depth = surface["frequency_hz"], t["water"]["depth_mm"]
    res = run("spectrum", heights, "-o", tmp_path / "s", "--depth", depth)
    assert res.returncode == 0, res.stderr
    peak = _rows(tmp_path / "s" / "peaks.csv")[0]
    assert abs(float(peak["frequency_hz"]) - f) < 0.02 * f
    k_theory = float(wavenumber(f, depth, gravity=water.STANDARD_GRAVITY, surface_tension=water.SURFACE_TENSION))
    k = float(peak["wavenumber_measured_rad_per_mm"])
    assert abs(k / k_theory - 1) < 0.01, (k, k_theory, peak)
