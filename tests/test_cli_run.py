"""`surfrec run` as a user calls it: equality with the sequential stages, resume after kills, faults.

The reference for every result is the sequential `surfrec match` + `surfrec
heights` on the same frames (bit-identical is expected; 1e-4 px / mm is the
issue's allowance), read back with h5py and xarray. The run is 18 frame pairs:
the 6 of a quick session listed three times (@LIST files), so that chunks,
time windows that cross chunk boundaries and interruptions all have room.
"""

import json
import os
import random
import resource
import signal
import subprocess
import sys
import time
import tomllib

import h5py
import numpy as np
import pytest

from surfrec.io.rigfile import write_rig
from surfrec.match.pipeline import FLAG_DROPPED, FLAG_UNREADABLE

TOL = 1e-4


def run(*args, **kw):
    return subprocess.run([sys.executable, "-m", "surfrec.cli.main", *map(str, args)], capture_output=True,
                          text=True, **kw)


def write_run(path, base, *, left="@left.txt", right="@right.txt", timing="fps = 500.0", out="heights.h5",
              match="time_window = 3", batch="chunk_frames = 4", heights=""):
    path.write_text(f"""
[inputs]
rig = "{base / 'rig.json'}"
datum = "{base / 'datum.h5'}"
left = "{left}"
right = "{right}"
{timing}

[output]
heights = "{out}"

[match]
{match}

[heights]
{heights}

[batch]
check_rig_frames = 2
{batch}
""")
    return path


def arrays(path):
    with h5py.File(path, "r") as f:
        return {k: f[k][()] for k in ("height", "height_uncertainty", "frame_flags", "time", "x", "y")}


def assert_same(a, b, frames=None):
    a, b = arrays(a), arrays(b)
    sel = slice(None) if frames is None else frames
    for k in ("height", "height_uncertainty"):
        x, y = a[k][sel], b[k][sel]
        assert x.shape == y.shape
        np.testing.assert_array_equal(np.isnan(x), np.isnan(y))
        assert np.nanmax(np.abs(x - y), initial=0.0) <= TOL, k
    np.testing.assert_array_equal(a["frame_flags"][sel], b["frame_flags"][sel])
    np.testing.assert_array_equal(a["x"], b["x"])


@pytest.fixture(scope="module")
def prepared(quick_session, make_true_rig, tmp_path_factory):
    s = quick_session("waves")
    work = tmp_path_factory.mktemp("run-cli")
    write_rig(make_true_rig(s / "truth.h5"), work / "rig.json")
    res = run("datum", "--rig", work / "rig.json", "--left", s / "still" / "left", "--right", s / "still" / "right",
              "-o", work / "datum.h5", "-q")
    assert res.returncode == 0, res.stderr
    names = sorted(p.name for p in (s / "waves" / "left").iterdir())
    for side in ("left", "right"):
        (work / f"{side}.txt").write_text("".join(f"{s / 'waves' / side / n}\n" for n in names * 3))
    # The reference: the sequential stages over the whole run.
    res = run("match", "--rig", work / "rig.json", "--datum", work / "datum.h5", "--left", f"@{work / 'left.txt'}",
              "--right", f"@{work / 'right.txt'}", "--fps", 500, "--time-window", 3, "-o", work / "disp.h5", "-q")
    assert res.returncode == 0, res.stderr
    res = run("heights", work / "disp.h5", "--rig", work / "rig.json", "--datum", work / "datum.h5",
              "-o", work / "ref.h5", "-q")
    assert res.returncode == 0, res.stderr
    return {"s": s, "work": work, "names": names}


def test_template_is_a_valid_run_file():
    res = run("run", "--template")
    assert res.returncode == 0
    assert tomllib.loads(res.stdout)["batch"]["on_bad_frame"] == "abort"


def test_pool_chunks_equal_the_sequential_stages(prepared, tmp_path):
    xr = pytest.importorskip("xarray")
    w = prepared["work"]
    # The output folder is a symbolic link (scratch space on a cluster): allowed.
    real = tmp_path / "scratch"
    real.mkdir()
    (tmp_path / "out").symlink_to(real)
    rf = write_run(tmp_path / "run.toml", w, left=f"@{w / 'left.txt'}", right=f"@{w / 'right.txt'}",
                   out=str(tmp_path / "out" / "heights.h5"))
    res = run("run", rf, "--workers", 2)
    assert res.returncode == 0, res.stderr
    out = tmp_path / "out" / "heights.h5"
    assert res.stdout.strip() == str(out)
    assert_same(out, w / "ref.h5")
    ds = xr.open_dataset(out, engine="h5netcdf")
    assert ds.height.dims == ("time", "y", "x") and ds.height.sizes["time"] == 18
    assert not (real / "heights.h5.journal").exists()      # removed once the output is in place
    log = (real / "heights.log").read_text()
    assert '(threads {"numba": 1, "opencv": 1})' in log     # one compute thread per worker
    assert "chunk 4 (frames 16-17)" in log and "summary:" in log and "rig check at the start" in log
    summary = json.loads(log.split("summary: ")[-1].splitlines()[0])
    assert summary["frames"] == 18 and summary["valid_fraction_mean"] > 0.9
    # Never overwritten without --force.
    res = run("run", rf)
    assert res.returncode == 2 and "already exists; use --force" in res.stderr


def test_dask_local_cluster_equals_the_local_pool(prepared, tmp_path):
    pytest.importorskip("distributed")
    w = prepared["work"]
    rf = write_run(tmp_path / "run.toml", w, left=f"@{w / 'left.txt'}", right=f"@{w / 'right.txt'}",
                   out=str(tmp_path / "heights.h5"), batch="chunk_frames = 5")
    res = run("run", rf, "--scheduler", "local", "--workers", 2)
    assert res.returncode == 0, res.stderr
    assert "LocalCluster" in (tmp_path / "heights.log").read_text()
    assert_same(tmp_path / "heights.h5", w / "ref.h5")


def test_dask_local_cluster_over_tls(prepared, tmp_path):
    # Dask's TLS settings (distributed.Security) from our --cluster-security file, with a self-signed
    # certificate made by the openssl command-line tool: the run goes over tls:// and gives the result
    # of the local pool; a file naming a missing certificate is one clear line, exit status 2.
    pytest.importorskip("distributed")
    import shutil
    if shutil.which("openssl") is None:
        pytest.skip("openssl is not installed")
    certs = tmp_path / "certs"
    certs.mkdir()
    made = subprocess.run(["openssl", "req", "-x509", "-newkey", "rsa:2048", "-nodes", "-subj", "/CN=localhost",
                           "-days", "2", "-keyout", str(certs / "key.pem"), "-out", str(certs / "cert.pem"),
                           "-addext", "subjectAltName=DNS:localhost,IP:127.0.0.1"], capture_output=True)
    if made.returncode != 0:
        pytest.skip("openssl could not make a test certificate")
    sec = certs / "tls.toml"
    sec.write_text('ca_file = "cert.pem"\ncert = "cert.pem"\nkey = "key.pem"\n')
    w = prepared["work"]
    rf = write_run(tmp_path / "run.toml", w, left=f"@{w / 'left.txt'}", right=f"@{w / 'right.txt'}",
                   out=str(tmp_path / "heights.h5"), batch="chunk_frames = 9")
    res = run("run", rf, "--scheduler", "local", "--workers", 2, "--cluster-security", sec)
    assert res.returncode == 0, res.stderr
    assert "tls://" in (tmp_path / "heights.log").read_text()
    assert_same(tmp_path / "heights.h5", w / "ref.h5")
    bad = certs / "bad.toml"
    bad.write_text('ca_file = "nowhere.pem"\ncert = "cert.pem"\nkey = "key.pem"\n')
    res = run("run", rf, "--scheduler", "local", "--cluster-security", bad, "--force", "-q")
    assert res.returncode == 2 and "nowhere.pem" in res.stderr and len(res.stderr.strip().splitlines()) == 1
    assert_same(tmp_path / "heights.h5", w / "ref.h5")  # the finished output is untouched


def _readable_or_absent(path):
    if path.exists():
        with h5py.File(path, "r") as f:           # a reader must always be able to open it
            assert f["height"].shape[0] == 18


@pytest.mark.parametrize("seed", [1, 2])
def test_kill_minus_9_at_random_moments_then_resume(prepared, tmp_path, seed):
    w = prepared["work"]
    rf = write_run(tmp_path / "run.toml", w, left=f"@{w / 'left.txt'}", right=f"@{w / 'right.txt'}",
                   out=str(tmp_path / "heights.h5"), batch="chunk_frames = 2")
    out = tmp_path / "heights.h5"
    rng = random.Random(seed)
    for _ in range(2):                       # two kills per seed, at random moments
        p = subprocess.Popen([sys.executable, "-m", "surfrec.cli.main", "run", str(rf), "--workers", "1", "-q"],
                             stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL, start_new_session=True)
        time.sleep(rng.uniform(0.5, 7.0))
        os.killpg(p.pid, signal.SIGKILL)     # the process and its children, as a power cut would
        p.wait()
        _readable_or_absent(out)
        if out.exists():
            break
    if not out.exists():
        res = run("run", rf, "--workers", 1)
        assert res.returncode == 0, res.stderr
    assert_same(out, w / "ref.h5")
    assert not list(tmp_path.glob(".heights.h5.partial-*"))


def test_ctrl_c_finishes_the_chunk_in_hand_and_resume_checks_the_inputs(prepared, tmp_path):
    w = prepared["work"]
    rf = write_run(tmp_path / "run.toml", w, left=f"@{w / 'left.txt'}", right=f"@{w / 'right.txt'}",
                   out=str(tmp_path / "heights.h5"), batch="chunk_frames = 2")
    p = subprocess.Popen([sys.executable, "-m", "surfrec.cli.main", "run", str(rf), "--workers", "1"],
                         stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    journal = tmp_path / "heights.h5.journal"
    deadline = time.monotonic() + 60
    while not list(journal.glob("chunk-*.h5")) and time.monotonic() < deadline:
        time.sleep(0.2)
    p.send_signal(signal.SIGINT)
    _, err = p.communicate(timeout=120)
    if p.returncode == 0:
        pytest.skip("the run finished before the interrupt arrived")
    assert p.returncode == 130, err
    assert f"run `surfrec run {rf}` again to resume" in err
    assert not (tmp_path / "heights.h5").exists()
    done = len(list(journal.glob("chunk-*.h5")))
    assert done >= 1
    # The run file changed: no resume, exit 2, saying what changed.
    text = rf.read_text()
    rf.write_text(text + "\n# edited\n")
    res = run("run", rf)
    assert res.returncode == 2 and "the run file changed" in res.stderr and "--force" in res.stderr
    rf.write_text(text)
    res = run("run", rf, "--workers", 1, "-v")
    assert res.returncode == 0, res.stderr
    assert f"resuming: {done} chunks done before" in res.stderr
    assert "frames: 18/18" in res.stderr              # the progress counts the frames done before too
    assert_same(tmp_path / "heights.h5", w / "ref.h5")


def test_corrupt_frame_abort_and_skip(prepared, tmp_path):
    w = prepared["work"]
    bad = tmp_path / "bad.png"
    # A real frame cut short: its header is intact, its pixel data are not (a write that never finished).
    good = (prepared["s"] / "waves" / "left" / prepared["names"][1]).read_bytes()
    bad.write_bytes(good[:len(good) // 3])
    lines = (w / "left.txt").read_text().splitlines()
    lines[7] = str(bad)
    (tmp_path / "left.txt").write_text("\n".join(lines) + "\n")
    common = dict(left=f"@{tmp_path / 'left.txt'}", right=f"@{w / 'right.txt'}", out=str(tmp_path / "h.h5"))
    rf = write_run(tmp_path / "abort.toml", w, **common)
    res = run("run", rf, "--workers", 1, "-q")
    assert res.returncode == 2, res.stderr
    # One line of ours (libpng may print its own complaint before it, from C).
    last = res.stderr.strip().splitlines()[-1]
    assert last.startswith("surfrec: error:") and "bad.png" in last and "Traceback" not in res.stderr
    assert 'set on_bad_frame = "skip" in [batch]' in last                 # the way past it
    assert not (tmp_path / "h.h5").exists()
    # No chunk_frames: the automatic chunking (two chunks of 9 for 2 workers, time window 3).
    rf = write_run(tmp_path / "skip.toml", w, batch='on_bad_frame = "skip"', **common)
    res = run("run", rf, "--workers", 2, "--force")
    assert res.returncode == 0, res.stderr
    assert "frame 7 is unreadable" in res.stderr
    a = arrays(tmp_path / "h.h5")
    assert a["frame_flags"][7] & FLAG_UNREADABLE and np.isnan(a["height"][7]).all()
    log = (tmp_path / "h.log").read_text()
    assert "frame 7" in log and "in 2 chunks of 9" in log
    # Nothing else is lost: every frame whose time window (3) misses frame 7 equals the reference.
    keep = np.array([i for i in range(18) if abs(i - 7) > 1])
    assert_same(tmp_path / "h.h5", w / "ref.h5", frames=keep)


def test_dropped_frames_from_timestamps(prepared, tmp_path):
    s, w = prepared["s"], prepared["work"]
    times = [0.0, 0.002, 0.004, 0.008, 0.010, 0.012]   # one frame time missing after the third
    ts = tmp_path / "ts.csv"
    ts.write_text("frame,left_s,right_s\n" + "".join(f"{i},{t},{t}\n" for i, t in enumerate(times)))
    rf = write_run(tmp_path / "run.toml", w, left=str(s / "waves" / "left"), right=str(s / "waves" / "right"),
                   timing=f'timestamps = "{ts}"', match="time_window = 1", out=str(tmp_path / "h.h5"))
    res = run("run", rf, "--workers", 1)
    assert res.returncode == 0, res.stderr
    assert "1 dropped frame" in res.stderr and "slot 3" in res.stderr
    a = arrays(tmp_path / "h.h5")
    assert a["height"].shape[0] == 7
    np.testing.assert_allclose(a["time"], [0, 0.002, 0.004, 0.006, 0.008, 0.010, 0.012], atol=1e-9)
    assert a["frame_flags"][3] & FLAG_DROPPED and np.isnan(a["height"][3]).all()
    # The other frames are those of the sequential stages on the six frames.
    res = run("match", "--rig", w / "rig.json", "--datum", w / "datum.h5", "--left", s / "waves" / "left",
              "--right", s / "waves" / "right", "--fps", 500, "-o", tmp_path / "d.h5", "-q")
    assert res.returncode == 0, res.stderr
    res = run("heights", tmp_path / "d.h5", "--rig", w / "rig.json", "--datum", w / "datum.h5",
              "-o", tmp_path / "r.h5", "-q")
    ref = arrays(tmp_path / "r.h5")
    np.testing.assert_array_equal(a["height"][[0, 1, 2, 4, 5, 6]], ref["height"])
    # Left and right clocks that disagree: an error, not a guess.
    ts.write_text("frame,left_s,right_s\n" + "".join(f"{i},{t},{t + 0.0006}\n" for i, t in enumerate(times)))
    res = run("run", rf, "--force")
    assert res.returncode == 2 and "not synchronised" in res.stderr


def test_full_disk_then_resume(prepared, tmp_path, monkeypatch):
    # An injected write failure (ENOSPC) in the journal, in this process.
    import errno

    from click.testing import CliRunner

    from surfrec.batch import executors, journal
    from surfrec.cli.main import cli

    monkeypatch.setattr(executors.SerialExecutor, "__init__", lambda self: None)  # keep this process's threads
    w = prepared["work"]
    rf = write_run(tmp_path / "run.toml", w, left=f"@{w / 'left.txt'}", right=f"@{w / 'right.txt'}",
                   out=str(tmp_path / "h.h5"), match="time_window = 1", batch="chunk_frames = 6")
    real = journal.Journal.write_chunk
    calls = {"n": 0}

    def full(self, k, arrays):
        calls["n"] += 1
        if calls["n"] == 2:
            raise OSError(errno.ENOSPC, "No space left on device", str(self.chunk_path(k)))
        return real(self, k, arrays)

    monkeypatch.setattr(journal.Journal, "write_chunk", full)
    res = CliRunner().invoke(cli, ["run", str(rf), "--workers", "1"])
    assert res.exit_code == 1
    assert "No space left on device" in res.output and "again to resume" in res.output
    assert not (tmp_path / "h.h5").exists()
    assert len(list((tmp_path / "h.h5.journal").glob("chunk-*.h5"))) == 1
    monkeypatch.setattr(journal.Journal, "write_chunk", real)
    res = run("run", rf, "--workers", 1, "-v")
    assert res.returncode == 0, res.stderr
    assert "resuming: 1 chunks done before" in res.stderr


def _limited():
    # 3 GiB of address space: a crafted input must fail cleanly, not by exhausting memory.
    resource.setrlimit(resource.RLIMIT_AS, (3 << 30, 3 << 30))


def test_crafted_inputs_give_clean_errors(prepared, tmp_path):
    w = prepared["work"]
    lists = dict(left=f"@{w / 'left.txt'}", right=f"@{w / 'right.txt'}")

    def check(rf, expected):
        res = run("run", rf, preexec_fn=_limited)
        assert res.returncode == 2, res.stderr
        assert expected in res.stderr, res.stderr
        assert "Traceback" not in res.stderr
        return res

    # A symbolic link where the output file goes.
    (tmp_path / "elsewhere.h5").write_text("precious")
    (tmp_path / "link.h5").symlink_to(tmp_path / "elsewhere.h5")
    check(write_run(tmp_path / "a.toml", w, out=str(tmp_path / "link.h5"), **lists), "is a symbolic link")
    assert (tmp_path / "elsewhere.h5").read_text() == "precious"
    # A grid of absurd size, and chunks too large for memory.
    check(write_run(tmp_path / "b.toml", w, out=str(tmp_path / "b.h5"), heights="grid_step_mm = 0.001", **lists),
          "nodes per frame")
    check(write_run(tmp_path / "c.toml", w, out=str(tmp_path / "c.h5"), heights="grid_step_mm = 0.5",
                    batch="chunk_frames = 100000", **lists), "choose a smaller chunk_frames")
    # A rig claiming huge images, and one with NaN in it.
    rig = json.loads((w / "rig.json").read_text())
    rig["image_size"] = [10**9, 10**9]
    (tmp_path / "rig.json").write_text(json.dumps(rig))
    text = write_run(tmp_path / "d.toml", w, out=str(tmp_path / "d.h5"), **lists).read_text()
    (tmp_path / "d.toml").write_text(text.replace(str(w / "rig.json"), str(tmp_path / "rig.json")))
    run_res = run("run", tmp_path / "d.toml", preexec_fn=_limited)
    assert run_res.returncode == 2 and "Traceback" not in run_res.stderr, run_res.stderr
    rig = json.loads((w / "rig.json").read_text())
    rig["cameras"]["left"]["matrix"][0][0] = float("nan")
    (tmp_path / "rig.json").write_text(json.dumps(rig))
    run_res = run("run", tmp_path / "d.toml", preexec_fn=_limited)
    assert run_res.returncode == 2 and "Traceback" not in run_res.stderr, run_res.stderr
    # A timestamps file with NaN, and one with a time gap of 10^12 frame periods.
    ts = tmp_path / "ts.csv"
    ts.write_text("frame,left_s,right_s\n0,0,0\n1,nan,nan\n")
    check(write_run(tmp_path / "e.toml", w, out=str(tmp_path / "e.h5"), timing=f'timestamps = "{ts}"', **lists),
          "NaN or infinite")
    # A datum that is not an HDF5 file at all.
    (tmp_path / "datum.h5").write_bytes(b"\x00" * 100)
    text = write_run(tmp_path / "f.toml", w, out=str(tmp_path / "f.h5"), **lists).read_text()
    (tmp_path / "f.toml").write_text(text.replace(str(w / "datum.h5"), str(tmp_path / "datum.h5")))
    run_res = run("run", tmp_path / "f.toml", preexec_fn=_limited)
    assert run_res.returncode == 2 and "Traceback" not in run_res.stderr, run_res.stderr
    # A run file with many mistakes lists them all.
    many = tmp_path / "g.toml"
    many.write_text('[inputs]\nrig = 3\nfps = -1.0\n[batch]\nchunk_frames = 0\nworkers = "two"\n[nonsense]\n')
    res = check(many, "problems:")
    for key in ("inputs.rig", "inputs.fps", "batch.chunk_frames", "batch.workers", "nonsense", "inputs.datum",
                "output.heights"):
        assert key in res.stderr, key
    assert not list(tmp_path.glob("*.journal"))
