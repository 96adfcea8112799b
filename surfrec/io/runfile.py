"""run.toml: what ``surfrec run`` processes and how (TOML, read with the standard library's tomllib).

The file names the rig, the datum, the left and right frames, the timing
(``fps`` or a timestamps file), the matcher and grid parameters, the output
and the batch policy (chunk size, workers or a Dask scheduler, what to do
with a bad frame, the rig and level checks). :data:`TEMPLATE` is a commented
example (``surfrec run --template``); docs/batch-runs.md is the reference.

Validation reports every problem at once, each with its key and line:
unknown tables and keys, wrong types, values out of range, NaN or infinite
numbers, missing files. The file is untrusted input: it is parsed as data
only (never evaluated), its size is capped before parsing, and every number
has a bound so that no value can make a later stage allocate without limit.
Relative paths are taken from the run file's folder, so a run file and its
inputs move together.
"""

from __future__ import annotations

import math
import re
import tomllib
from dataclasses import dataclass, field
from pathlib import Path

from surfrec.errors import InputError

__all__ = ["RunConfig", "read_run_file", "parse_run_text", "TEMPLATE", "MAX_RUN_FILE_BYTES"]

# A run file is a few dozen lines; anything this large is not one (and would
# only cost memory to parse).
MAX_RUN_FILE_BYTES = 1 << 20

RECTIFY_METHODS = ("bspline3", "bspline5", "cubic", "lanczos4", "linear")
BAD_FRAME_POLICIES = ("abort", "skip")

TEMPLATE = """\
# surfrec run file: one overnight run, `surfrec run RUN.toml`.
# Relative paths are taken from this file's folder. Reference: docs/batch-runs.md.

[inputs]
rig = "rig.json"                      # from `surfrec calibrate`
datum = "datum.h5"                    # from `surfrec datum`, made with the same rig
left = "waves/left"                   # a folder, a glob ("waves/left/*.png"), a multi-page TIFF or "@list.txt"
right = "waves/right"
timestamps = "waves/timestamps.csv"   # header frame,left_s,right_s: frames pair by time, drops are found
# fps = 500.0                         # ... or a fixed frame rate (frames pair by index); give one of the two
# sync_tolerance_s = 0.0002           # largest |left_s - right_s| of a pair (default: a tenth of a frame period)

[output]
heights = "heights.h5"                # the product; the log goes beside it (heights.log), the journal
                                      # of finished chunks to heights.h5.journal/ until the run completes

[match]
# window = 17                         # odd px; default: the datum's (from the speckle size)
# spacing = 4                         # px; default: the datum's
time_window = 1                       # odd number of frames correlated together
max_excursion_mm = 5.0                # largest excursion from the still water; sets the search band
rectify = "bspline3"                  # bspline3 | bspline5 | cubic | lanczos4 | linear
shape_order = 1                       # 1 | 2: 2 follows the surface's curvature (short waves; use a larger window)
saturation = 0.98                     # fraction of full scale from which a pixel is saturated (a glint)
bad_pixels = true                     # leave saturated, hot and dead pixels out of the correlation windows
# mask = "mask.png"                   # left camera, non-zero = measure

[heights]
# grid_step_mm = 1.0                  # default: the matches' spacing on the water, rounded down
# extent_mm = [-100.0, 100.0, -80.0, 80.0]   # xmin, xmax, ymin, ymax, datum frame
# exclude_circles_mm = [[0.0, 0.0, 25.0]]    # x, y, r of each disc to blank
# exclude_polygons = ["walls.txt"]    # files of x,y vertices (see `surfrec heights --help`)
still_correction = true

[batch]
# chunk_frames = 64                   # frames per chunk (the unit of parallel work and of resume); default:
                                      # chosen per run (up to 64, the same work for every worker)
# workers = 2                         # local worker processes; default: the cores this process may use
# scheduler = "tcp://10.0.0.5:8786"   # a Dask scheduler, or "local" for a LocalCluster (pip install surfrec[cluster])
# cluster_security = "tls.toml"       # Dask TLS certificates (docs/batch-runs.md); never run a scheduler
                                      # on a network that untrusted machines reach
on_bad_frame = "abort"                # abort | skip (an unreadable or blank frame becomes a flagged NaN frame)
strict_rig = false                    # true: stop with exit status 3 when check-rig finds the rig moved
check_rig_frames = 3                  # frame pairs of each rig check
check_rig_every = 5000                # repeat the rig check every so many frames (0: only at the start)
rig_tolerance_px = 0.3                # check-rig tolerance, px
level_drift_mm = 0.3                  # warn when a chunk's mean water level moves this far from the first chunk's
"""

# key -> (kind, required, bounds or choices, help for messages)
_SCHEMA = {
    "inputs": {
        "rig": ("file", True, None), "datum": ("file", True, None),
        "left": ("images", True, None), "right": ("images", True, None),
        "timestamps": ("file", False, None), "fps": ("float", False, (0.0, 1e7, True)),
        "sync_tolerance_s": ("float", False, (0.0, 10.0, True)),
    },
    "output": {"heights": ("output", True, None)},
    "match": {
        "window": ("odd", False, (3, 255)), "spacing": ("int", False, (1, 1000)),
        "time_window": ("odd", False, (1, 51)), "max_excursion_mm": ("float", False, (0.0, 1000.0, True)),
        "rectify": ("choice", False, RECTIFY_METHODS), "mask": ("file", False, None),
        "shape_order": ("int", False, (1, 2)),
        "saturation": ("float", False, (0.0, 1.0, True)), "bad_pixels": ("bool", False, None),
    },
    "heights": {
        "grid_step_mm": ("float", False, (0.0, 1e4, True)), "extent_mm": ("extent", False, None),
        "exclude_circles_mm": ("circles", False, None), "exclude_polygons": ("files", False, None),
        "still_correction": ("bool", False, None),
    },
    "batch": {
        "chunk_frames": ("int", False, (1, 100_000)), "workers": ("int", False, (1, 4096)),
        "scheduler": ("str", False, None), "cluster_security": ("file", False, None),
        "on_bad_frame": ("choice", False, BAD_FRAME_POLICIES), "strict_rig": ("bool", False, None),
        "check_rig_frames": ("int", False, (0, 100)), "check_rig_every": ("int", False, (0, 10**9)),
        "rig_tolerance_px": ("float", False, (0.0, 100.0, True)), "level_drift_mm": ("float", False, (0.0, 1e4, True)),
    },
}

_DEFAULTS = {
    "match.time_window": 1, "match.max_excursion_mm": 5.0, "match.rectify": "bspline3", "match.shape_order": 1,
    "match.saturation": 0.98, "match.bad_pixels": True,
    "heights.still_correction": True, "heights.exclude_circles_mm": [], "heights.exclude_polygons": [],
    "batch.on_bad_frame": "abort", "batch.strict_rig": False,
    "batch.check_rig_frames": 3, "batch.check_rig_every": 5000, "batch.rig_tolerance_px": 0.3,
    "batch.level_drift_mm": 0.3,
}

# At most this many exclusion discs / polygon files: plenty for posts and walls.
_MAX_LIST = 1000


@dataclass
class RunConfig:
    """A validated run file.

    Attributes
    ----------
    path : the run file.  text : its text.  sha256 : SHA-256 of its bytes.
    values : dotted key ("inputs.rig") -> value, with the defaults filled in;
        paths are absolute (taken from the run file's folder when relative),
        image specifications keep their form ("@" + absolute list file, a
        folder, a glob).
    """

    path: Path
    text: str
    sha256: str
    values: dict = field(default_factory=dict)

    def __getitem__(self, key):
        return self.values.get(key)

    @property
    def output(self) -> Path:
        """The heights file the run writes."""
        return Path(self.values["output.heights"])


def read_run_file(path) -> RunConfig:
    """Read and validate a run file.

    Parameters
    ----------
    path : str or Path of a TOML run file.

    Returns
    -------
    RunConfig

    Raises
    ------
    InputError
        The file cannot be read, is not TOML, or has problems: the message
        lists every problem, one per line, with its line and key.
    """
    import hashlib

    p = Path(path)
    try:
        size = p.stat().st_size
    except OSError as exc:
        raise InputError(f"run file {p} cannot be read ({exc.strerror})") from None
    if not p.is_file():
        raise InputError(f"run file {p} is not a file")
    if size > MAX_RUN_FILE_BYTES:
        raise InputError(f"run file {p} is {size:,} bytes; a run file is a few kB (the limit is "
                         f"{MAX_RUN_FILE_BYTES:,} bytes)")
    try:
        raw = p.read_bytes()
    except OSError as exc:
        raise InputError(f"run file {p} cannot be read ({exc.strerror})") from None
    try:
        text = raw.decode("utf-8")
    except UnicodeDecodeError:
        raise InputError(f"run file {p} is not UTF-8 text") from None
    values = parse_run_text(text, base=p.resolve().parent, name=str(p))
    return RunConfig(path=p, text=text, sha256=hashlib.sha256(raw).hexdigest(), values=values)


def parse_run_text(text: str, *, base: Path, name: str = "run file", check_files: bool = True) -> dict:
    """Validate the text of a run file; dotted key -> value (see :class:`RunConfig`).

    Parameters
    ----------
    text : the TOML text.  base : folder relative paths are taken from.
    name : what the file is called in messages.
    check_files : whether named input files must exist.

    Raises
    ------
    InputError listing every problem ("line N: key: what is wrong").
    """
    try:
        doc = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise InputError(f"{name} is not valid TOML: {exc}") from None
    lines = _key_lines(text)
    problems = []

    def bad(key, msg):
        problems.append((lines.get(key, lines.get(key.split(".")[0], 0)), key, msg))

    out = dict(_DEFAULTS)
    for table, content in doc.items():
        if table not in _SCHEMA:
            bad(table, f"unknown table [{table}] (expected one of {', '.join('[' + t + ']' for t in _SCHEMA)})")
            continue
        if not isinstance(content, dict):
            bad(table, f"'{table}' must be a table [{table}]")
            continue
        for key, value in content.items():
            dotted = f"{table}.{key}"
            spec = _SCHEMA[table].get(key)
            if spec is None:
                near = ", ".join(_SCHEMA[table])
                bad(dotted, f"unknown key '{key}' in [{table}] (known: {near})")
                continue
            try:
                out[dotted] = _check(spec, value, base, check_files)
            except ValueError as exc:
                bad(dotted, str(exc))
    for table, keys in _SCHEMA.items():
        for key, spec in keys.items():
            if spec[1] and f"{table}.{key}" not in out and not any(
                    k == f"{table}.{key}" for _, k, _ in problems):
                problems.append((lines.get(table, 0), f"{table}.{key}", "missing (required)"))
    has_fps, has_ts = "inputs.fps" in out, "inputs.timestamps" in out
    if has_fps == has_ts and not any(k in ("inputs.fps", "inputs.timestamps") for _, k, _ in problems):
        where = "inputs.fps" if has_fps else "inputs"
        bad(where, "give exactly one of 'fps' or 'timestamps' in [inputs]")
    ext = out.get("heights.extent_mm")
    if ext is not None and not (ext[0] < ext[1] and ext[2] < ext[3]):
        bad("heights.extent_mm", "expected [xmin, xmax, ymin, ymax] with xmin < xmax and ymin < ymax")
    if problems:
        problems.sort(key=lambda t: (t[0] or 1 << 30, t[1]))
        body = "\n".join(f"  {'line ' + str(ln) if ln else 'missing'}: {key}: {msg}" for ln, key, msg in problems)
        count = f"{len(problems)} problem{'s' if len(problems) > 1 else ''}"
        raise InputError(f"{name}: {count}:\n{body}")
    return out


def _check(spec, value, base: Path, check_files: bool):
    kind, _, bounds = spec
    if kind == "bool":
        if not isinstance(value, bool):
            raise ValueError(f"expected true or false, got {_show(value)}")
        return value
    if kind in ("int", "odd"):
        if isinstance(value, bool) or not isinstance(value, int):
            raise ValueError(f"expected a whole number, got {_show(value)}")
        lo, hi = bounds
        if not lo <= value <= hi:
            raise ValueError(f"{value} is out of range (expected {lo} to {hi})")
        if kind == "odd" and value % 2 == 0:
            raise ValueError(f"{value} must be odd")
        return value
    if kind == "float":
        return _number(value, bounds)
    if kind == "choice":
        if not isinstance(value, str) or value not in bounds:
            raise ValueError(f"expected one of {', '.join(repr(b) for b in bounds)}, got {_show(value)}")
        return value
    if kind == "str":
        if not isinstance(value, str) or not value.strip() or len(value) > 4096:
            raise ValueError(f"expected a non-empty string, got {_show(value)}")
        return value.strip()
    if kind == "file":
        return _path(value, base, check_files, must_exist=True)
    if kind == "output":
        return _path(value, base, False, must_exist=False)
    if kind == "files":
        if not isinstance(value, list) or len(value) > _MAX_LIST:
            raise ValueError(f"expected a list of file names (at most {_MAX_LIST}), got {_show(value)}")
        return [_path(v, base, check_files, must_exist=True) for v in value]
    if kind == "images":
        if not isinstance(value, str) or not value.strip():
            raise ValueError(f"expected a folder, a glob, a multi-page TIFF or '@LIST', got {_show(value)}")
        if value == "-":
            raise ValueError("'-' (standard input) cannot be used in a run file; give a folder, a glob or '@LIST'")
        if value.startswith("@"):
            return "@" + str(_path(value[1:], base, check_files, must_exist=True))
        p = Path(value).expanduser()
        p = p if p.is_absolute() else base / p
        if check_files and not any(ch in value for ch in "*?[") and not p.exists():
            raise ValueError(f"{p} does not exist")
        return str(p)
    if kind == "extent":
        if not isinstance(value, list) or len(value) != 4:
            raise ValueError(f"expected [xmin, xmax, ymin, ymax] in mm, got {_show(value)}")
        return [_number(v, (-1e6, 1e6, False)) for v in value]
    if kind == "circles":
        if not isinstance(value, list) or len(value) > _MAX_LIST:
            raise ValueError(f"expected a list of [x, y, r] in mm (at most {_MAX_LIST}), got {_show(value)}")
        out = []
        for c in value:
            if not isinstance(c, list) or len(c) != 3:
                raise ValueError(f"expected a list of [x, y, r] in mm, got {_show(c)} in it")
            x, y, r = (_number(v, (-1e6, 1e6, False)) for v in c)
            if r <= 0:
                raise ValueError(f"a circle's radius must be positive, got {r:g}")
            out.append((x, y, r))
        return out
    raise AssertionError(kind)  # pragma: no cover - the schema names only the kinds above


def _number(value, bounds):
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        raise ValueError(f"expected a number, got {_show(value)}")
    v = float(value)
    if not math.isfinite(v):
        raise ValueError(f"expected a finite number, got {value}")
    lo, hi, lo_open = bounds
    if v > hi or v < lo or (lo_open and v == lo):
        raise ValueError(f"{value:g} is out of range (expected {'above' if lo_open else 'from'} {lo:g} "
                         f"{'and at most' if lo_open else 'to'} {hi:g})")
    return v


def _path(value, base: Path, check: bool, *, must_exist: bool) -> Path:
    if not isinstance(value, str) or not value.strip() or len(value) > 4096:
        raise ValueError(f"expected a file name, got {_show(value)}")
    p = Path(value).expanduser()
    p = p if p.is_absolute() else base / p
    if check and must_exist and not p.is_file():
        raise ValueError(f"{p} does not exist" if not p.exists() else f"{p} is not a file")
    return p


def _show(value) -> str:
    text = repr(value)
    kind = {bool: "a boolean", int: "a whole number", float: "a number", str: "a string", list: "a list",
            dict: "a table"}.get(type(value), type(value).__name__)
    return f"{kind} {text[:40] + '...' if len(text) > 40 else text}"


_TABLE = re.compile(r"^\s*\[\s*([A-Za-z0-9_\-]+)\s*\]\s*(#.*)?$")
_KEY = re.compile(r"^\s*([A-Za-z0-9_\-]+)\s*=")
_DOTTED = re.compile(r"^\s*([A-Za-z0-9_\-]+)\.([A-Za-z0-9_\-]+)\s*=")


def _key_lines(text: str) -> dict:
    """Dotted key -> line number (1-based) where it is set; table name -> its header line.

    tomllib reports no positions, so the lines are found here with the
    simple layout run files use (one key per line, [table] headers, dotted
    keys at the top level); keys it cannot place report no line.
    """
    out = {}
    table = None
    for n, line in enumerate(text.splitlines(), start=1):
        m = _TABLE.match(line)
        if m:
            table = m.group(1)
            out.setdefault(table, n)
            continue
        m = _DOTTED.match(line) if table is None else None
        if m:
            out.setdefault(m.group(1), n)
            out.setdefault(f"{m.group(1)}.{m.group(2)}", n)
            continue
        m = _KEY.match(line)
        if m:
            key = m.group(1) if table is None else f"{table}.{m.group(1)}"
            out.setdefault(key, n)
    return out
