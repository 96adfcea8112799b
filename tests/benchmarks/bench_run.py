"""Benchmark of `surfrec run`: parallel efficiency, batch overhead, memory against run length, projection.

Usage::

    python tests/benchmarks/bench_run.py --session DIR [--frames N] [--repeats R]
        [--memory-session QDIR] [--memory-frames 200,2000] [--json-out FILE]

DIR is a session folder (`surfrec synth DIR`, the default 1280x1024 session,
or a `--quick` one) holding rig.json and datum.h5 (made with `surfrec
calibrate` / `surfrec datum`, or a true rig) and waves/left, waves/right. Its
wave frames are listed cyclically in @LIST files to make a run of N frame
pairs without rendering them all (the frames differ, the cost per frame is
that of real frames). QDIR (default: DIR) serves the memory runs, which use a
coarse grid (spacing 16 px) to stay quick.

Three configurations are timed **interleaved** in each repeat, in a rotating
order (the machine is shared: quote medians and ratios measured in the same
run):

- ``direct``: the stages called directly in one process — read the rig, the
  datum and the frame headers, ``prepare_matching``, ``match_frames`` over
  every frame, ``heights_of_frame``, and the same heights.h5 written with
  ``HeightsWriter`` (what `surfrec match` + `surfrec heights` compute, without
  the disparity file in between);
- ``run1``: `surfrec run --workers 1` (chunks in the client process);
- ``run2``: `surfrec run --workers 2` (a local pool of two worker processes).

Each is a fresh process (imports, kernel loading and set-up included in all
three). Wall time and CPU time (user + system of the process and all its
children) are recorded. Figures: parallel efficiency ``run1 / (2 run2)``
(wall), batch overhead ``run1 / direct - 1`` (wall and CPU), CPU of run2
over run1 (work the pool adds), peak resident memory at two run lengths, and
the hours a 50,000-pair run of 1-megapixel frames takes on this machine,
from the measured cost per frame scaled by the pixel count.
"""

import argparse
import json
import os
import resource
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path


def cli(*args):
    return [sys.executable, "-m", "surfrec.cli.main", *map(str, args)]


def lists(s: Path, work: Path, n: int, tag: str):
    out = []
    names = sorted(p.name for p in (s / "waves/left").iterdir())
    for side in ("left", "right"):
        p = work / f"{tag}-{side}.txt"
        p.write_text("".join(f"{s / 'waves' / side / names[i % len(names)]}\n" for i in range(n)))
        out.append(p)
    return out


def run_file(s, work, n, tag, *, spacing=None, chunk=None):
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
{'chunk_frames = %d' % chunk if chunk else ''}
check_rig_frames = 0
""")
    return rf, left, right


DIRECT = """
import sys, time, numpy as np
from surfrec.batch.worker import limit_threads
limit_threads()
from surfrec.io.rigfile import read_rig
from surfrec.io.datumfile import read_datum
from surfrec.io.images import open_frames
from surfrec.io.heightsfile import HeightsWriter
from surfrec.match.session import prepare_matching, match_frames
from surfrec.geometry.session import prepare_heights, heights_of_frame
rig_p, datum_p, left_p, right_p, out_p = sys.argv[1:6]
t0 = time.perf_counter()
rig = read_rig(rig_p); datum = read_datum(datum_p)
lf = open_frames(left_p, expected_size=rig.image_size); rf = open_frames(right_p, expected_size=rig.image_size)
n = len(lf)
times = np.arange(n) / 500.0
setup = prepare_matching(rig, datum, lf[0], times)
hs = prepare_heights(setup.grid_u, setup.grid_v, rig, datum)
w = HeightsWriter(out_p, hs.plan.x, hs.plan.y, attrs={"world_to_left_camera": datum.world_to_left_camera.ravel()},
                  time_origin_iso=None, n_frames=n, footprint=hs.plan.footprint)
t_write = 0.0
for r in match_frames(setup, lf, rf, range(n)):
    fh = heights_of_frame(hs, r.disparity, r.disparity_sigma, r.flags)
    t1 = time.perf_counter()
    w.append(times[r.index], fh.height, fh.uncertainty, fh.flags)
    t_write += time.perf_counter() - t1
w.close()
print(time.perf_counter() - t0, t_write)
"""


def timed(cmd, env=None):
    """Wall seconds and CPU seconds (user + system, the process and its children) of one command."""
    before = resource.getrusage(resource.RUSAGE_CHILDREN)
    t0 = time.perf_counter()
    p = subprocess.run(cmd, capture_output=True, text=True, env=env)
    wall = time.perf_counter() - t0
    after = resource.getrusage(resource.RUSAGE_CHILDREN)
    if p.returncode:
        raise SystemExit(p.stderr)
    cpu = (after.ru_utime - before.ru_utime) + (after.ru_stime - before.ru_stime)
    return wall, cpu, p.stdout


def peak_rss_mb(rf, workers):
    """Peak resident memory (MB) of the largest process of one run (client, or a worker)."""
    code = ("import resource, subprocess, sys\n"
            f"p = subprocess.run({cli('run', rf, '--workers', workers, '--force', '-q')!r}, capture_output=True)\n"
            "assert p.returncode == 0, p.stderr\n"
            "print(resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss)\n")
    p = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True)
    if p.returncode:
        raise SystemExit(p.stderr)
    return int(p.stdout.strip().splitlines()[-1]) / 1024.0  # Linux reports kB


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--session", type=Path, required=True)
    ap.add_argument("--memory-session", type=Path)
    ap.add_argument("--repeats", type=int, default=3)
    ap.add_argument("--frames", type=int, default=40)
    ap.add_argument("--memory-frames", default="200,2000")
    ap.add_argument("--json-out", type=Path)
    args = ap.parse_args()
    work = Path(tempfile.mkdtemp(prefix="bench-run-"))
    s = args.session.resolve()
    n = args.frames
    rf, left, right = run_file(s, work, n, "eff")
    direct = [sys.executable, "-c", DIRECT, s / "rig.json", s / "datum.h5", f"@{left}", f"@{right}",
              work / "direct.h5"]
    configs = {"direct": lambda: timed(list(map(str, direct))),
               "run1": lambda: timed(cli("run", rf, "--workers", 1, "--force", "-q")),
               "run2": lambda: timed(cli("run", rf, "--workers", 2, "--force", "-q"))}
    timed(cli("run", rf, "--workers", 1, "--force", "-q"))  # warm the numba cache and the file cache
    wall = {k: [] for k in configs}
    cpu = {k: [] for k in configs}
    write_s = []
    order = list(configs)
    for r in range(args.repeats):
        for k in order[r % 3:] + order[:r % 3]:          # rotate, so no configuration always goes first
            w, c, out = configs[k]()
            wall[k].append(w)
            cpu[k].append(c)
            if k == "direct":
                write_s.append(float(out.split()[1]))
            print(f"repeat {r}: {k} {w:.2f} s wall, {c:.2f} s CPU (load {os.getloadavg()[0]:.1f})", file=sys.stderr)
    med = {k: statistics.median(v) for k, v in wall.items()}
    medc = {k: statistics.median(v) for k, v in cpu.items()}
    rig = json.loads((s / "rig.json").read_text())
    w_px, h_px = rig["image_size"]
    mp = w_px * h_px / 1e6
    eff = [a / (2 * b) for a, b in zip(wall["run1"], wall["run2"])]
    ovh = [a / b - 1 for a, b in zip(wall["run1"], wall["direct"])]
    out = {"session": str(s), "image_px": [w_px, h_px], "frames": n, "repeats": args.repeats,
           "wall_s": wall, "cpu_s": cpu, "median_wall_s": med, "median_cpu_s": medc,
           "direct_write_s_median": statistics.median(write_s),
           "parallel_efficiency_1_to_2_median": statistics.median(eff),
           "parallel_efficiency_of_medians": med["run1"] / (2 * med["run2"]),
           "batch_overhead_wall_median": statistics.median(ovh),
           "batch_overhead_cpu": medc["run1"] / medc["direct"] - 1,
           "cpu_run2_over_run1": medc["run2"] / medc["run1"],
           "s_per_frame_direct": med["direct"] / n, "s_per_frame_run1": med["run1"] / n,
           "s_per_frame_run2": med["run2"] / n, "cpu_s_per_frame_run1": medc["run1"] / n}
    # Projection: the matcher's work scales with the grid points, i.e. with the pixels.
    out["projected_hours_50000_1MP_from_run2_wall"] = 50000 * (med["run2"] / n) / mp / 3600
    out["projected_hours_50000_1MP_from_cpu_2_cores"] = 50000 * (medc["run1"] / n) / mp / 2 / 3600
    # Memory against run length (the same small frames, a coarse grid keeps it quick).
    ms = (args.memory_session or s).resolve()
    for m in (int(x) for x in args.memory_frames.split(",") if x.strip()):   # "" skips the memory runs
        mrf, _, _ = run_file(ms, work, m, f"m{m}", spacing=16)
        out[f"peak_rss_mb_{m}_frames_1_worker"] = peak_rss_mb(mrf, 1)
        out[f"peak_rss_mb_{m}_frames_2_workers"] = peak_rss_mb(mrf, 2)
    text = json.dumps(out, indent=1)
    print(text)
    if args.json_out:
        args.json_out.write_text(text)


if __name__ == "__main__":
    main()
