"""``surfrec run RUN.toml``: a whole overnight run — match + heights, in parallel, resumable, crash-safe."""

from __future__ import annotations

import json
import logging
import os
import shlex
import signal
import sys
import time

import click

from surfrec.cli.options import force_option, verbosity, workers_option

log = logging.getLogger("surfrec")
# Per-chunk lines go to the log file only (stderr has the progress bar).
record = logging.getLogger("surfrec.record")


@click.command("run")
@click.argument("run_file", metavar="RUN.toml", required=False, type=click.Path(dir_okay=False))
@click.option("--template", is_flag=True, help="Print a commented example run file and exit.")
@workers_option
@click.option("--scheduler", default=None, metavar="ADDRESS",
              help="A Dask scheduler (tls://host:8786), or 'local' for a LocalCluster on this machine "
                   "(pip install 'surfrec[cluster]'). Default: a local process pool.")
@click.option("--cluster-security", "security_path", default=None, metavar="FILE", type=click.Path(dir_okay=False),
              help="TOML file naming the Dask TLS certificates (ca_file, cert, key); see docs/batch-runs.md.")
@click.option("--strict-rig", is_flag=True, default=False,
              help="Stop with exit status 3 when the rig check at the start finds the rig moved.")
@force_option
@verbosity
def command(run_file, template, workers, scheduler, security_path, strict_rig, force):
    """Process a whole run described by RUN.toml: match + heights into one heights.h5.

    Frames are cut into chunks (batch.chunk_frames) processed in parallel by
    a local process pool (--workers, one compute thread each) or a Dask
    cluster (--scheduler). Each finished chunk is stored durably in a journal
    beside the output (OUTPUT.journal/), so after a crash, a kill or a full
    disk the same command continues from the first unfinished chunk; the final
    heights.h5 appears only when complete, and equals that of an uninterrupted
    sequential run. Resuming requires the run file, rig, datum and inputs to be
    unchanged (else exit status 2, or --force to start over). Ctrl-C finishes
    the chunks in hand and says how to resume. A log (parameters, per-chunk
    timings, warnings, summary) goes beside the output (OUTPUT.log).
    """
    from surfrec.errors import InputError

    if template:
        from surfrec.io.runfile import TEMPLATE

        click.echo(TEMPLATE, nl=False)
        return
    if run_file is None:
        raise click.UsageError("give a run file (RUN.toml), or --template for an example")
    try:
        return _run(run_file, workers, scheduler, security_path, strict_rig, force)
    except ValueError as exc:
        if isinstance(exc, InputError):
            raise
        raise InputError(str(exc)) from None


def _run(run_file, workers, scheduler, security_path, strict_rig, force):
    import hashlib

    from surfrec._version import __version__
    from surfrec.batch import plan as plan_mod
    from surfrec.batch.journal import Journal
    from surfrec.batch.worker import JobSpec, _state
    from surfrec.cli.options import available_cores
    from surfrec.errors import InputError
    from surfrec.io.datumfile import read_datum
    from surfrec.io.images import open_frames, pair_frames
    from surfrec.io.outputs import check_output
    from surfrec.io.polygons import read_polygons
    from surfrec.io.rigfile import file_sha256, read_rig
    from surfrec.io.runfile import read_run_file
    from surfrec.io.timestamps import read_camera_times

    t_start = time.monotonic()
    cfg = read_run_file(run_file)
    v = cfg.values
    out = cfg.output
    # A symbolic link where the output file goes could send the write anywhere;
    # a symbolic link to the output's folder (scratch space) is fine.
    if out.is_symlink():
        raise InputError(f"output {out} is a symbolic link; give the name of a file to create (a linked folder "
                         "is fine)")
    check_output(out, force=force)
    strict_rig = strict_rig or v["batch.strict_rig"]

    # ---- inputs: validated before any work starts
    rig = read_rig(v["inputs.rig"])
    rig_hash = file_sha256(v["inputs.rig"])
    datum = read_datum(v["inputs.datum"])
    datum_hash = file_sha256(v["inputs.datum"])
    if datum.rig_sha256 and datum.rig_sha256 != rig_hash:
        raise InputError(f"{v['inputs.datum']} was made with another rig than {v['inputs.rig']} (rig SHA-256 "
                         "differs); make the datum again with this rig")
    lf = open_frames(v["inputs.left"], expected_size=rig.image_size, name="left images")
    rf = open_frames(v["inputs.right"], expected_size=rig.image_size, name="right images")
    if v.get("inputs.timestamps"):
        ts = v["inputs.timestamps"]
        lt, rt = read_camera_times(ts)
        for times, seq in ((lt, lf), (rt, rf)):
            if times.size != len(seq):
                raise InputError(f"timestamps file {ts} gives {times.size} times for the {seq.name} but there are "
                                 f"{len(seq)} images")
        slots = plan_mod.slots_by_time(lt, rt, tolerance_s=v.get("inputs.sync_tolerance_s"))
        timing = f"timestamps {ts} (frames paired by time)"
    else:
        pair_frames(lf, rf)
        slots = plan_mod.slots_by_index(len(lf), v["inputs.fps"])
        timing = f"fps={v['inputs.fps']:g} (frames paired by index)"
    n = len(slots)
    if not ((slots.left >= 0) & (slots.right >= 0)).any():
        raise InputError("no frame pair to process: every frame lacks its partner")
    polygons = []
    for pf in v["heights.exclude_polygons"]:
        polygons.extend(read_polygons(pf))
    match_opts = {"window": v.get("match.window"), "spacing": v.get("match.spacing"),
                  "time_window": v["match.time_window"], "max_excursion_mm": v["match.max_excursion_mm"],
                  "rectify": v["match.rectify"], "shape_order": v["match.shape_order"],
                  "saturation": v["match.saturation"], "bad_pixels": v["match.bad_pixels"],
                  "mask": str(v["match.mask"]) if v.get("match.mask") else None}
    heights_opts = {"grid_step_mm": v.get("heights.grid_step_mm"), "extent_mm": v.get("heights.extent_mm"),
                    "circles": [list(c) for c in v["heights.exclude_circles_mm"]],
                    "polygons": [p.tolist() for p in polygons], "still_correction": v["heights.still_correction"]}
    journal = Journal(out.parent / f"{out.name}.journal")
    spec = JobSpec(rig=str(v["inputs.rig"]), datum=str(v["inputs.datum"]), left=v["inputs.left"],
                   right=v["inputs.right"], slot_left=slots.left, slot_right=slots.right, slot_time=slots.time,
                   slot_flags=slots.flags, match=match_opts, heights=heights_opts,
                   on_bad_frame=v["batch.on_bad_frame"], check_rig_every=v["batch.check_rig_every"],
                   check_rig_frames=v["batch.check_rig_frames"], rig_tolerance_px=v["batch.rig_tolerance_px"],
                   journal=os.path.abspath(journal.folder))
    # The set-up the workers make, made here too: it validates the inputs once
    # more before anything starts, and gives the grid of heights.h5.
    try:
        st = _state(spec, limit=False)
    except ValueError as exc:
        raise InputError(str(exc)) from None
    setup, hsetup = st["setup"], st["hsetup"]
    ny, nx = hsetup.shape
    chunk_frames = v.get("batch.chunk_frames")
    if chunk_frames is not None and not plan_mod.frames_fit(chunk_frames, ny, nx):
        raise InputError(f"{cfg.path}: batch.chunk_frames = {chunk_frames} frames of {nx} x {ny} nodes would hold "
                         f"{8 * chunk_frames * ny * nx / 2**30:.1f} GiB per chunk; choose a smaller chunk_frames")
    workers = workers or v.get("batch.workers") or available_cores()

    # ---- the journal: resume only what was made from the same inputs
    inputs_hash = hashlib.sha256(json.dumps(
        {"left": [[nm, _size(p)] for nm, (p, _) in zip(lf.names, lf.sources)],
         "right": [[nm, _size(p)] for nm, (p, _) in zip(rf.names, rf.sources)],
         "timestamps": file_sha256(v["inputs.timestamps"]) if v.get("inputs.timestamps") else None,
         "mask": file_sha256(v["match.mask"]) if v.get("match.mask") else None,
         "polygons": [file_sha256(p) for p in v["heights.exclude_polygons"]]}).encode()).hexdigest()
    hashes = {"run file": cfg.sha256, "rig": rig_hash, "datum": datum_hash, "list of inputs": inputs_hash}
    journal.lock()
    try:
        resumed = False
        if journal.exists() and not force:
            manifest = journal.read_manifest()
            changed = [k for k, h in hashes.items() if manifest.get("hashes", {}).get(k) != h]
            if changed:
                raise InputError(f"cannot resume the run in {journal.folder}: the {', the '.join(changed)} changed "
                                 "since it began; restore them, or use --force to start over")
            # The chunking is the journal's, whatever the workers now (an automatic
            # chunk size depends on the worker count of the first session).
            recorded = manifest.get("chunk_frames")
            if (not isinstance(recorded, int) or isinstance(recorded, bool) or not 1 <= recorded <= 100_000
                    or not plan_mod.frames_fit(recorded, ny, nx)):
                raise InputError(f"{journal.manifest_path} records no usable chunk size; use --force to start over")
            chunk_frames = recorded
            resumed = True
        else:
            if chunk_frames is None:
                chunk_frames = plan_mod.auto_chunk_frames(n, workers=workers, time_window=v["match.time_window"],
                                                          ny=ny, nx=nx)
            manifest = {"software": f"surfrec {__version__}", "hashes": hashes, "run_file": str(cfg.path),
                        "started": _now_iso(), "slots": n, "chunk_frames": chunk_frames, "grid": [ny, nx]}
            journal.start(manifest)
        chunks = plan_mod.chunk_ranges(n, chunk_frames)
        done = journal.done(len(chunks))
        _remove_stale_partials(out)
        logfile = _open_log(out)
        return _execute(locals())
    finally:
        journal.unlock()


def _execute(ctx):
    """The run proper (split from _run to keep the set-up readable); ctx holds the set-up's names."""
    from surfrec._version import __version__
    from surfrec.batch.executors import dask_security, make_executor
    from surfrec.batch.runner import assemble, execute_chunks
    from surfrec.batch.worker import check_rig_on, run_chunk
    from surfrec.cli.progress import Progress
    from surfrec.errors import CheckFailed, InputError, ProcessingError
    from surfrec.io.heightsfile import HeightsWriter

    c = ctx
    v, cfg, out, journal, chunks, done, slots, st = (c["v"], c["cfg"], c["out"], c["journal"], c["chunks"],
                                                      c["done"], c["slots"], c["st"])
    setup, hsetup, n = c["setup"], c["hsetup"], c["n"]
    handler = c["logfile"]
    try:
        log.info("surfrec %s: run %s -> %s (%d frames in %d chunks of %d; %s)", __version__, cfg.path, out, n,
                 len(chunks), c["chunk_frames"], "resuming: %d chunks done before" % len(done) if c["resumed"]
                 else "new run")
        record.info("command: %s", " ".join(shlex.quote(a) for a in ["surfrec", *sys.argv[1:]]))
        record.info("parameters: %s", json.dumps({k: str(x) if not isinstance(x, (int, float, bool, list, type(None)))
                                                  else x for k, x in sorted(v.items())}, default=str))
        record.info("timing: %s; matcher: %s", c["timing"], json.dumps(setup.params.to_dict()))
        record.info("grid: %d x %d nodes, step %g mm", hsetup.shape[1], hsetup.shape[0], hsetup.plan.step)
        if slots.dropped.size:
            log.warning("warning: %s (kept as NaN frames flagged 'dropped'; no time window reaches across them)",
                        slots.describe_drops())

        # ---- the chunks
        todo = [k for k in range(len(chunks)) if k not in done]
        workers = c["workers"]
        scheduler = c["scheduler"] or v.get("batch.scheduler")
        sec_path = c["security_path"] or v.get("batch.cluster_security")
        security = dask_security(sec_path) if sec_path else None
        if security is not None and not scheduler:
            raise InputError("--cluster-security applies to a Dask scheduler; give --scheduler too")
        # The pool starts now: its workers start up and make the run's set-up while
        # this process checks the rig.
        executor = (make_executor(workers=workers, scheduler=scheduler, security=security, spec=c["spec"])
                    if todo else None)
        try:
            # ---- the rig check on the first frames (the workers start meanwhile)
            nchk = v["batch.check_rig_frames"]
            if nchk > 0:
                first = [s for s in range(n) if slots.left[s] >= 0 and slots.right[s] >= 0][:nchk]
                try:
                    chk = check_rig_on(st, first, v["batch.rig_tolerance_px"])
                except InputError as exc:
                    chk = {"holds": True, "message": f"not checked ({exc})", "p95_px": float("nan"), "warnings": []}
                    log.warning("warning: rig check at the start: %s", exc)
                record.info("rig check at the start (%d frame pairs): %s (95th percentile |dv| %.3f px)", len(first),
                            chk["message"], chk["p95_px"])
                if not chk["holds"]:
                    if c["strict_rig"]:
                        raise CheckFailed(f"{chk['message']} (rig check on the first {len(first)} frame pairs; "
                                          "--strict-rig)")
                    log.warning("warning: rig check at the start: %s", chk["message"])
        except BaseException:
            if executor is not None:
                executor.shutdown(cancel=True)
            raise
        stop = {"asked": False}

        def on_sigint(signum, frame):
            if stop["asked"]:
                raise KeyboardInterrupt
            stop["asked"] = True
            log.warning("interrupt: finishing the chunks in hand (press Ctrl-C again to stop at once)")

        level0 = {"mm": _first_level(journal, done)}
        frames_todo = sum(chunks[k][1] - chunks[k][0] for k in todo)
        t0 = time.monotonic()
        if executor is not None:
            log.info("computing %d chunks (%d frames) on %s", len(todo), frames_todo, executor.name)
        old = signal.signal(signal.SIGINT, on_sigint)
        # A resumed run's bar counts the frames of the chunks done before.
        count = {"frames": n - frames_todo}
        complete = True
        try:
            with Progress(max(n, 1), "frames", initial=count["frames"]) as progress:
                def on_done(k, res):
                    a, b = chunks[k]
                    count["frames"] += b - a
                    progress(count["frames"])
                    info = json.loads(str(res["info"]))
                    _chunk_record(k, a, b, res, info, level0, v["batch.level_drift_mm"])
                try:
                    if todo:
                        complete = execute_chunks(executor, run_chunk, c["spec"], chunks, journal, todo=todo,
                                                  on_done=on_done, should_stop=lambda: stop["asked"])
                finally:
                    if executor is not None:
                        executor.shutdown(cancel=True)
        except OSError as exc:
            raise ProcessingError(f"{exc.strerror or exc} ({exc.filename or journal.folder}); the finished chunks "
                                  f"are kept in {journal.folder}: fix this, then run `surfrec run {cfg.path}` "
                                  "again to resume") from None
        finally:
            signal.signal(signal.SIGINT, old)
        wall = time.monotonic() - t0
        if not complete:
            left = len(chunks) - len(journal.done(len(chunks)))
            msg = (f"interrupted: {len(chunks) - left} of {len(chunks)} chunks are done and kept in {journal.folder}; "
                   f"run `surfrec run {cfg.path}` again to resume")
            record.info(msg)
            click.echo(f"surfrec: {msg}", err=True)
            return 130

        # ---- one writer: the journal's chunks into heights.h5, published when complete
        plan = hsetup.plan
        writer = HeightsWriter(out, plan.x, plan.y, attrs=_provenance(c), time_origin_iso=c["manifest"]["started"],
                               n_frames=n, footprint=plan.footprint)
        try:
            path, summary = assemble(journal, chunks, hsetup.shape, writer,
                                     extra_attrs={"wall_seconds_last_session": round(wall, 3)})
        except OSError as exc:
            raise ProcessingError(f"{exc.strerror or exc} writing {out}; the finished chunks are kept in "
                                  f"{journal.folder}: fix this, then run `surfrec run {cfg.path}` again") from None
        journal.remove()
        s = summary.to_dict()
        total = time.monotonic() - c["t_start"]
        spf = wall / frames_todo if frames_todo else float("nan")
        log.info("wrote %s: %d frames (%d dropped, %d bad), valid fraction %.1f%%, noise floor %.4f mm (median "
                 "1-sigma), %.3f s per frame, wall time %.1f s", path, s["frames"], s["dropped_frames"],
                 s["bad_frames"], 100 * s["valid_fraction_mean"], s["noise_floor_mm"], spf, total)
        record.info("summary: %s", json.dumps({**s, "wall_seconds": round(total, 3), "seconds_per_frame": spf}))
        click.echo(str(path))
        return 0
    finally:
        for lg in (log, record):
            lg.removeHandler(handler)
        handler.close()


def _chunk_record(k, a, b, res, info, level0, drift_mm):
    import numpy as np

    level = info.get("level_mm", float("nan"))
    record.info("chunk %d (frames %d-%d): %.2f s on %s[%s] (threads %s), valid %.1f%%, coverage %.1f%%, "
                "mean level %+.4f mm%s", k, a, b - 1, info.get("seconds", float("nan")), info.get("host"),
                info.get("pid"), json.dumps(info.get("threads")),
                100 * float(np.mean(res["valid_fraction"])), 100 * float(np.mean(res["coverage"])), level,
                "".join(f"; {what} frame {s} ({names})" for s, what, names in info.get("bad_frames", [])))
    for s, what, names in info.get("bad_frames", []):
        log.warning("warning: frame %d is %s (%s): kept as a NaN frame flagged '%s'", s, what, names, what)
    if np.isfinite(level):
        if level0["mm"] is None or not np.isfinite(level0["mm"]):
            level0["mm"] = level
        elif abs(level - level0["mm"]) > drift_mm:
            log.warning("warning: the mean water level of frames %d-%d is %+.3f mm from the run's first chunk "
                        "(more than %g mm): the level is drifting (evaporation, a leak)", a, b - 1,
                        level - level0["mm"], drift_mm)
    chk = info.get("check")
    if chk:
        if "error" in chk:
            log.warning("warning: rig check at frame %d could not run: %s", chk["slot"], chk["error"])
        else:
            record.info("rig check at frame %d: %s (95th percentile |dv| %.3f px)", chk["slot"], chk["message"],
                        chk["p95_px"])
            if not chk["holds"]:
                log.warning("warning: rig check at frame %d: %s", chk["slot"], chk["message"])


def _first_level(journal, done):
    if 0 not in done:
        return None
    info = journal.read_info(0)   # None when damaged: the assembly finds it again; the drift check starts later
    try:
        return float(info.get("level_mm"))
    except (AttributeError, TypeError, ValueError):
        return None


def _provenance(c) -> dict:
    from surfrec.io.heightsfile import _json_default

    v, cfg, datum, setup, hsetup, slots = c["v"], c["cfg"], c["datum"], c["setup"], c["hsetup"], c["slots"]
    plan = hsetup.plan
    datum_root = {"world_to_left_camera": datum.world_to_left_camera.reshape(-1).tolist(),
                  "plane": [*datum.plane_normal.tolist(), float(datum.plane_offset)],
                  "fit_rms_mm": datum.fit_rms_mm, "n_frames": datum.n_frames, "rig_sha256": datum.rig_sha256,
                  **datum.attrs}
    attrs = {
        "world_to_left_camera": datum.world_to_left_camera.reshape(-1),
        "history": " ".join(shlex.quote(a) for a in ["surfrec", *sys.argv[1:]]),
        "run_file": str(cfg.path), "run_file_sha256": cfg.sha256, "run_toml": cfg.text,
        "rig_file": str(v["inputs.rig"]), "rig_sha256": c["rig_hash"],
        "rig_json": v["inputs.rig"].read_text(encoding="utf-8"),
        "datum_file": str(v["inputs.datum"]), "datum_sha256": c["datum_hash"],
        "datum_attributes": json.dumps(datum_root, default=_json_default),
        "inputs_sha256": c["inputs_hash"], "timing": c["timing"],
        "left_first": c["lf"].names[0], "left_last": c["lf"].names[-1],
        "right_first": c["rf"].names[0], "right_last": c["rf"].names[-1],
        "dropped_frames": int(slots.dropped.size), "dropped_summary": slots.describe_drops(),
        "on_bad_frame": v["batch.on_bad_frame"], "chunk_frames": c["chunk_frames"],
        "speckle_px": float(setup.speckle_px),
        "grid_step_mm": plan.step, "point_spacing_mm": plan.point_spacing_mm, "extent_mm": list(plan.extent),
        "measured_extent_mm": list(plan.measured_extent),
        "exclude_circles_mm": json.dumps([list(x) for x in v["heights.exclude_circles_mm"]]),
        "exclude_polygon_files": json.dumps([str(p) for p in v["heights.exclude_polygons"]]),
        "still_correction": bool(v["heights.still_correction"]),
        "time_origin_source": "the start of the run (no clock time of the frames is known)",
        **{f"match_param_{k}": x for k, x in setup.params.to_dict().items() if x is not None},
    }
    return attrs


def _size(p) -> int:
    try:
        return p.stat().st_size
    except OSError:
        return -1


def _now_iso() -> str:
    import datetime as dt

    return dt.datetime.now(dt.timezone.utc).isoformat(timespec="seconds")


def _remove_stale_partials(out):
    # A run killed during the assembly leaves its hidden .NAME.partial-* file;
    # the journal's lock says no other run is writing one now.
    for p in out.parent.glob(f".{out.name}.partial-*"):
        try:
            p.unlink()
        except OSError:
            pass


def _open_log(out):
    path = out.with_suffix(".log") if out.suffix else out.parent / f"{out.name}.log"
    handler = logging.FileHandler(path, mode="a", encoding="utf-8")
    handler.setFormatter(logging.Formatter("%(asctime)s %(message)s"))
    handler.setLevel(logging.INFO)
    log.addHandler(handler)
    record.addHandler(handler)
    record.setLevel(logging.INFO)
    record.propagate = False
    return handler
