"""run.toml reading and validation (surfrec.io.runfile), against tomllib, the standard library's TOML reader."""

import tomllib

import pytest

from surfrec.errors import InputError
from surfrec.io.runfile import MAX_RUN_FILE_BYTES, TEMPLATE, parse_run_text, read_run_file


def _files(tmp_path):
    for name in ("rig.json", "datum.h5", "waves/timestamps.csv"):
        p = tmp_path / name
        p.parent.mkdir(parents=True, exist_ok=True)
        p.write_text("x")
    (tmp_path / "waves" / "left").mkdir()
    (tmp_path / "waves" / "right").mkdir()


def test_template_is_toml_and_valid(tmp_path):
    # tomllib (Python's own TOML 1.0 reader) is the reference for the syntax.
    doc = tomllib.loads(TEMPLATE)
    assert set(doc) == {"inputs", "output", "match", "heights", "batch"}
    _files(tmp_path)
    v = parse_run_text(TEMPLATE, base=tmp_path)
    assert v["inputs.rig"] == tmp_path / "rig.json"            # relative to the run file's folder
    assert v["output.heights"] == tmp_path / "heights.h5"
    assert "chunk_frames" not in doc["batch"] and v.get("batch.chunk_frames") is None   # chosen per run
    assert v["batch.on_bad_frame"] == "abort"


def test_every_problem_listed_with_key_and_line(tmp_path):
    _files(tmp_path)
    text = (TEMPLATE.replace('rig = "rig.json"', 'rig = "missing.json"')
            .replace("time_window = 1", "time_window = 4")
            .replace("max_excursion_mm = 5.0", "max_excursion_mm = nan")
            .replace("# chunk_frames = 64", 'chunk_frames = "many"\ncolour = "blue"')
            .replace("strict_rig = false", "strict_rig = 1")
            .replace('on_bad_frame = "abort"', 'on_bad_frame = "ignore"')
            + "\n[extras]\nx = 1\n")
    lines = text.splitlines()

    def line_of(fragment):
        return next(i for i, ln in enumerate(lines, 1) if ln.startswith(fragment))

    with pytest.raises(InputError) as e:
        parse_run_text(text, base=tmp_path, name="run.toml")
    msg = str(e.value)
    assert msg.startswith("run.toml: 8 problems:")
    for key, fragment in (("inputs.rig", "rig ="), ("match.time_window", "time_window ="),
                          ("match.max_excursion_mm", "max_excursion_mm ="), ("batch.chunk_frames", "chunk_frames ="),
                          ("batch.colour", "colour ="), ("batch.strict_rig", "strict_rig ="),
                          ("batch.on_bad_frame", "on_bad_frame ="), ("extras", "[extras]")):
        assert f"line {line_of(fragment)}: {key}:" in msg, key
    assert "must be odd" in msg and "finite" in msg and "unknown table [extras]" in msg


@pytest.mark.parametrize("edit, expected", [
    (("# chunk_frames = 64", "chunk_frames = 1000000000000"), "out of range"),
    (("# chunk_frames = 64", "chunk_frames = 0"), "out of range"),
    (("max_excursion_mm = 5.0", "max_excursion_mm = inf"), "finite"),
    (("# grid_step_mm = 1.0", "grid_step_mm = -1.0"), "out of range"),
    (("shape_order = 1", "shape_order = 3"), "out of range"),
    (("# extent_mm = [-100.0, 100.0, -80.0, 80.0]", "extent_mm = [100.0, -100.0, 0.0, 1.0]"), "xmin < xmax"),
    (("# extent_mm = [-100.0, 100.0, -80.0, 80.0]", "extent_mm = [1, 2, 3]"), "xmin, xmax"),
    (("# exclude_circles_mm = [[0.0, 0.0, 25.0]]", "exclude_circles_mm = [[0, 0, -1]]"), "radius"),
    (("# fps = 500.0", "fps = 500.0"), "exactly one of 'fps' or 'timestamps'"),
    (('left = "waves/left"', 'left = "-"'), "standard input"),
    (('left = "waves/left"', "left = 3"), "expected a folder"),
])
def test_bad_values_named(tmp_path, edit, expected):
    _files(tmp_path)
    with pytest.raises(InputError, match=expected):
        parse_run_text(TEMPLATE.replace(*edit), base=tmp_path)


def test_missing_required_and_bad_toml(tmp_path):
    with pytest.raises(InputError, match=r"inputs.rig: missing \(required\)"):
        parse_run_text("[inputs]\nfps = 10.0\n", base=tmp_path)
    with pytest.raises(InputError, match="not valid TOML"):
        parse_run_text("[inputs\n", base=tmp_path)


def test_oversized_and_binary_files_refused_before_parsing(tmp_path):
    big = tmp_path / "big.toml"
    with open(big, "wb") as fh:
        fh.truncate(MAX_RUN_FILE_BYTES + 1)
    with pytest.raises(InputError, match="a run file is a few kB"):
        read_run_file(big)
    binary = tmp_path / "bin.toml"
    binary.write_bytes(b"\xff\xfe\x00garbage")
    with pytest.raises(InputError, match="not UTF-8"):
        read_run_file(binary)
