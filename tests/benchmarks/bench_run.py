"""Benchmark of `surfrec run`: parallel efficiency, batch overhead, memory against run length, projection.

Usage: python tests/benchmarks/bench_run.py [--session DIR] [--repeats N]

DIR is a synthetic session folder (`surfrec synth DIR`, the default 1280x1024
session; `--quick` ones work too) with rig.json and datum.h5 made by
`surfrec calibrate` / `surfrec datum`; without it a quick session is made in
a temporary folder. Every figure is a median over --repeats runs and is
quoted as a ratio against a reference measured in the same process tree
(the machine is shared): 1 worker against 2, the batch layer against calling
the stages directly, 200 frames against 2000.
"""

import argparse
import json
import resource
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path


def sh(*args, cwd=None):
    res = subprocess.run([sys.executable, "-m", "surfrec.cli.main", *map(str, args)], capture_output=True, text=True,
                         cwd=cwd)
    if res.returncode:
        raise SystemExit(res.stderr)
    return res


def make_session(root: Path) -> Path:
    s = root / "session"
    sh("synth", s, "--quick", "-q")
    sh("calibrate", "--left", s / "target/left/*.png", "--right", s / "target/right/*.png", "--board", "11x8",
       "--square", 15, "-o", s / "rig.json", "-q")
    sh("datum", "--rig", s / "rig.json", "--left", s / "still/left", "--right", s / "still/right", "-o",
       s / "datum.h5", "-q")
    return s


def lists(s: Path, work: Path, n: int, tag: str):
    out = []
    names = sorted(p.name for p in (s / "waves/left").iterdir())
    for side in ("left", "right"):
        p = work / f"{tag}-{side}.txt"
        p.write_text("".join(f"{s / 'waves' / side / names[i % len(names)]}\n" for i in range(n)))
        out.append(p)
    return out


def run_file(s, work, n, tag, *, chunk=16, spacing=None):
    left, right = lists(s, work, n, tag)
    rf = work / f"{tag}.toml"
    rf.write_text(f"""[inputs]
rig = "{s / 'rig.json'}"
datum = "{s / 'datum.h5'}"
left = "@{left}"
right = "@{right}"
fps = 500.0
[output]
heights = "{work / (tag + '.h5')}"
[match]
{'spacing = %d' % spacing if spacing else ''}
[batch]
chunk_frames = {chunk}
check_rig_frames = 0
""")
    return rf


def timed_run(rf, workers):
    t0 = time.perf_counter()
    sh("run", rf, "--workers", workers, "--force", "-q")
    return time.perf_counter() - t0


def direct_stages(s, n):
    """The stages called directly in one process (no run file, journal, chunks or assembly)."""
    code = f"""
import time, numpy as np
from surfrec.batch.worker import limit_threads
limit_threads()
from surfrec.io.rigfile import read_rig
from surfrec.io.datumfile import read_datum
from surfrec.io.images import open_frames
from surfrec.match.session import prepare_matching, match_frames
from surfrec.geometry.session import prepare_heights, heights_of_frame
t0 = time.perf_counter()
rig = read_rig({str(s / 'rig.json')!r}); datum = read_datum({str(s / 'datum.h5')!r})
lf = open_frames({str(s / 'waves/left')!r}); rf = open_frames({str(s / 'waves/right')!r})
m = len(lf)
class Rep:
    def __init__(self, seq): self.seq = seq
    def __getitem__(self, i): return self.seq[i % m]
setup = prepare_matching(rig, datum, lf[0], np.arange({n}) / 500.0)
hs = prepare_heights(setup.grid_u, setup.grid_v, rig, datum)
for r in match_frames(setup, Rep(lf), Rep(rf), range({n})):
    heights_of_frame(hs, r.disparity, r.disparity_sigma, r.flags)
print(time.perf_counter() - t0)
"""
    t0 = time.perf_counter()
    subprocess.run([sys.executable, "-c", code], check=True, capture_output=True)
    return time.perf_counter() - t0


def peak_rss_mb(rf):
    """Peak resident memory (MB) of one serial run (--workers 1: client and worker are one process)."""
    code = ("import resource, sys\n"
            "from surfrec.cli.main import cli\n"
            "try:\n"
            f"    cli(['run', {str(rf)!r}, '--workers', '1', '--force', '-q'])\n"
            "except SystemExit as e:\n"
            "    assert not e.code, e.code\n"
            "print(resource.getrusage(resource.RUSAGE_SELF).ru_maxrss)\n")
    p = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True)
    if p.returncode:
        raise SystemExit(p.stderr)
    return int(p.stdout.strip().splitlines()[-1]) / 1024.0  # Linux reports kB


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--session", type=Path)
    ap.add_argument("--repeats", type=int, default=3)
    ap.add_argument("--frames", type=int, default=48)
    args = ap.parse_args()
    tmp = Path(tempfile.mkdtemp(prefix="bench-run-"))
    s = args.session or make_session(tmp)
    n = args.frames
    rf = run_file(s, tmp, n, "eff")
    timed_run(rf, 1)  # warm the numba cache and the file cache
    t1 = [timed_run(rf, 1) for _ in range(args.repeats)]
    t2 = [timed_run(rf, 2) for _ in range(args.repeats)]
    td = [direct_stages(s, n) for _ in range(args.repeats)]
    m1, m2, md = map(statistics.median, (t1, t2, td))
    out = {"frames": n, "seconds_1_worker": m1, "seconds_2_workers": m2, "seconds_direct_stages": md,
           "parallel_efficiency_1_to_2": m1 / (2 * m2), "batch_overhead": m1 / md - 1,
           "seconds_per_frame_1_worker": m1 / n, "seconds_per_frame_2_workers": m2 / n}
    rig = json.loads((s / "rig.json").read_text())
    w, h = rig["image_size"]
    per_mp = (m2 / n) / (w * h / 1e6)   # the matcher's work scales with the grid points, i.e. with the pixels
    out["image_megapixels"] = w * h / 1e6
    out["projected_hours_50000_1MP_pairs_2_cores"] = 50000 * per_mp / 3600
    # Memory against run length: the same small frames, 200 and 2000 of them (a coarse grid keeps it quick).
    out["peak_rss_mb_200_frames"] = peak_rss_mb(run_file(s, tmp, 200, "m200", chunk=64, spacing=16))
    out["peak_rss_mb_2000_frames"] = peak_rss_mb(run_file(s, tmp, 2000, "m2000", chunk=64, spacing=16))
    print(json.dumps(out, indent=1))


if __name__ == "__main__":
    main()
