"""Tests of surfrec.io.images: input specifications, ordering, decoding, bit depth, errors.

References: OpenCV (cv2.imread / cv2.cvtColor) and tifffile decode the same
files independently of the module's bookkeeping; expected orders are the
natural order as commonly defined (digit runs compare by value); expected
messages are the ones the specification of the module states.
"""

from __future__ import annotations

import io
import logging
import struct
import zlib

import cv2
import numpy as np
import pytest
import tifffile

from surfrec.errors import InputError
from surfrec.io import images
from surfrec.io.images import FrameSequence, natural_key, open_frames, pair_frames, save_image

W, H = 40, 30  # deliberately not square, so (width, height) order is tested


@pytest.fixture(autouse=True)
def _propagating_logs(monkeypatch):
    # The command line stops "surfrec" records at its own handler; caplog
    # listens at the root, so let the records through during these tests.
    monkeypatch.setattr(logging.getLogger("surfrec"), "propagate", True)


def _grey(seed: int, high: int = 256, dtype=np.uint8, size=(W, H)) -> np.ndarray:
    return np.random.default_rng(seed).integers(0, high, (size[1], size[0])).astype(dtype)


def _write_pngs(folder, names, **kw):
    folder.mkdir(parents=True, exist_ok=True)
    for k, n in enumerate(names):
        assert cv2.imwrite(str(folder / n), _grey(k, **kw))
    return folder


def _with_sbit(path, bits: int) -> None:
    """Insert an sBIT chunk right after IHDR (PNG specification, section 11.3.3.4)."""
    data = path.read_bytes()
    body = b"sBIT" + bytes([bits])
    chunk = struct.pack(">I", 1) + body + struct.pack(">I", zlib.crc32(body))
    path.write_bytes(data[:33] + chunk + data[33:])


# ---------------------------------------------------------------- specifications and order


def test_glob_gives_natural_order(tmp_path):
    _write_pngs(tmp_path, ["frame_10.png", "frame_2.png", "frame_1.png"])
    seq = open_frames(str(tmp_path / "frame_*.png"))
    # natural order as commonly defined: 1 < 2 < 10, not the character order 1 < 10 < 2
    assert [n.rsplit("/", 1)[-1] for n in seq.names] == ["frame_1.png", "frame_2.png", "frame_10.png"]
    assert len(seq) == 3 and seq.size == (W, H)


def test_folder_lists_only_visible_image_files(tmp_path):
    _write_pngs(tmp_path, ["b.png", "a.PNG", ".hidden.png"])
    (tmp_path / "notes.txt").write_text("not an image")
    (tmp_path / "sub").mkdir()
    _write_pngs(tmp_path / "sub", ["c.png"])  # no recursion
    seq = open_frames(str(tmp_path))
    assert seq.names == ["a.PNG", "b.png"]
    assert seq.sources == [(tmp_path / "a.PNG", None), (tmp_path / "b.png", None)]


def test_multipage_tiff_file_gives_one_frame_per_page(tmp_path):
    stack = np.stack([_grey(k, 65536, np.uint16) for k in range(3)])
    tifffile.imwrite(tmp_path / "run.tif", stack, photometric="minisblack")
    seq = open_frames(str(tmp_path / "run.tif"), name="left images")
    assert len(seq) == 3
    assert seq.names == [f"{tmp_path / 'run.tif'}[{k}]" for k in range(3)]
    assert [page for _, page in seq.sources] == [0, 1, 2]
    for k in range(3):  # tifffile as the reference decoder
        np.testing.assert_array_equal(seq.read_raw(k), tifffile.imread(tmp_path / "run.tif", key=k))


def test_folder_holding_one_multipage_tiff_gives_its_pages(tmp_path):
    stack = np.stack([_grey(k) for k in range(4)])
    tifffile.imwrite(tmp_path / "run.tiff", stack, photometric="minisblack")
    seq = open_frames(str(tmp_path))
    assert seq.names == [f"run.tiff[{k}]" for k in range(4)]
    np.testing.assert_array_equal(seq.read_raw(3), stack[3])


def test_list_file_keeps_order_and_skips_comments_and_blank_lines(tmp_path, monkeypatch):
    _write_pngs(tmp_path / "left", ["f_1.png", "f_2.png", "f_10.png"])
    (tmp_path / "left.txt").write_text("# chosen order\n\nleft/f_10.png\n  left/f_1.png  \n\n# end\nleft/f_2.png\n")
    monkeypatch.chdir(tmp_path)  # relative names resolve against the current directory
    seq = open_frames("@left.txt")
    assert seq.names == ["left/f_10.png", "left/f_1.png", "left/f_2.png"]  # the list's order, not sorted
    assert seq.sources[0] == (tmp_path / "left" / "f_10.png", None)


def test_dash_reads_names_from_stdin(tmp_path):
    _write_pngs(tmp_path, ["b.png", "a.png"])
    names = f"{tmp_path / 'b.png'}\n{tmp_path / 'a.png'}\n"
    seq = open_frames("-", stdin=io.StringIO(names))
    assert seq.names == [str(tmp_path / "b.png"), str(tmp_path / "a.png")]  # the given order


def test_natural_key_orders_digit_runs_by_value():
    names = ["frame_10", "frame_2", "Frame_3", "frame_002", "frame_1", "frame_0009"]
    # common natural order: numbers by value, text case-sensitively ("F" < "f"),
    # equal values ordered by the whole string ("frame_002" < "frame_2")
    assert sorted(names, key=natural_key) == ["Frame_3", "frame_1", "frame_002", "frame_2", "frame_0009", "frame_10"]
    padded = [f"img_{k:04d}.png" for k in (12, 3, 100, 7)]
    assert sorted(padded, key=natural_key) == sorted(padded)  # zero padding: same as plain order


# ---------------------------------------------------------------- decoding and scaling


def test_8bit_png_pixels_and_scale(tmp_path):
    _write_pngs(tmp_path, ["a.png"])
    seq = open_frames(str(tmp_path / "a.png"))
    reference = cv2.imread(str(tmp_path / "a.png"), cv2.IMREAD_UNCHANGED)  # OpenCV as reference
    assert (seq.dtype, seq.bit_depth, seq.size) == (np.uint8, 8, (W, H))
    np.testing.assert_array_equal(seq.read_raw(0), reference)
    frame = seq[0]
    assert frame.dtype == np.float32 and frame.shape == (H, W)
    np.testing.assert_array_equal(frame, reference.astype(np.float32) / np.float32(255))


def test_16bit_png_with_12bit_data(tmp_path):
    raw = _grey(1, 4096, np.uint16)
    raw[0, 0] = 4001  # a known maximum, odd so the data are not left-aligned
    raw[raw > 4001] = 4001
    cv2.imwrite(str(tmp_path / "a.png"), raw)
    seq = open_frames(str(tmp_path / "a.png"))
    assert (seq.dtype, seq.bit_depth) == (np.uint16, 12)  # largest value 4001 <= 4095
    assert seq[0].max() == np.float32(4001) / np.float32(4095)


def test_16bit_png_full_range(tmp_path):
    raw = _grey(2, 65536, np.uint16)
    cv2.imwrite(str(tmp_path / "a.png"), raw)
    seq = open_frames(str(tmp_path / "a.png"))
    assert seq.bit_depth == 16
    np.testing.assert_array_equal(seq[0], raw.astype(np.float32) / np.float32(65535))


def test_left_aligned_12bit_data_count_as_16bit(tmp_path):
    raw = (_grey(3, 1000, np.uint16) << 4).astype(np.uint16)  # dim 12-bit data shifted up by 4
    cv2.imwrite(str(tmp_path / "a.png"), raw)
    assert open_frames(str(tmp_path / "a.png")).bit_depth == 16


def test_png_sbit_chunk_gives_bit_depth(tmp_path):
    raw = _grey(4, 901, np.uint16)  # the value ladder alone would say 10 bits
    cv2.imwrite(str(tmp_path / "a.png"), raw)
    _with_sbit(tmp_path / "a.png", 12)
    seq = open_frames(str(tmp_path / "a.png"))
    assert seq.bit_depth == 12
    np.testing.assert_array_equal(seq.read_raw(0), raw)


def test_bit_depth_override(tmp_path):
    cv2.imwrite(str(tmp_path / "a.png"), _grey(5, 1024, np.uint16))
    seq = open_frames(str(tmp_path / "a.png"), bit_depth=14)
    assert seq.bit_depth == 14
    with pytest.raises(InputError, match="a.png"):
        open_frames(str(tmp_path / "a.png"), bit_depth=17)


def test_colour_png_converted_to_grey_with_one_warning(tmp_path, caplog):
    for k in range(2):
        colour = np.random.default_rng(k).integers(0, 256, (H, W, 3)).astype(np.uint8)
        cv2.imwrite(str(tmp_path / f"c{k}.png"), colour)
    with caplog.at_level(logging.WARNING, logger="surfrec.io.images"):
        seq = open_frames(str(tmp_path), name="left images")
        grey = [seq.read_raw(k) for k in range(2)]
    warnings = [r.getMessage() for r in caplog.records if r.name == "surfrec.io.images"]
    assert warnings == ["left images: colour images converted to grey"]
    reference = cv2.cvtColor(cv2.imread(str(tmp_path / "c1.png"), cv2.IMREAD_UNCHANGED), cv2.COLOR_BGR2GRAY)
    np.testing.assert_array_equal(grey[1], reference)  # OpenCV's conversion as reference


def test_colour_tiff_uses_rgb_order(tmp_path):
    rgb = np.random.default_rng(6).integers(0, 256, (H, W, 3)).astype(np.uint8)
    tifffile.imwrite(tmp_path / "c.tif", rgb, photometric="rgb")
    seq = open_frames(str(tmp_path / "c.tif"))
    np.testing.assert_array_equal(seq.read_raw(0), cv2.cvtColor(rgb, cv2.COLOR_RGB2GRAY))


# ---------------------------------------------------------------- errors


def test_mixed_sizes_name_the_first_odd_file(tmp_path):
    _write_pngs(tmp_path, ["f_1.png", "f_2.png"])
    cv2.imwrite(str(tmp_path / "f_3.png"), _grey(0, size=(20, 10)))
    with pytest.raises(InputError) as err:
        open_frames(str(tmp_path), name="left images")
    assert str(err.value) == f"left images: f_3.png is 20x10 px but f_1.png is {W}x{H} px"


def test_expected_size_mismatch(tmp_path):
    cv2.imwrite(str(tmp_path / "frame_0001.png"), np.zeros((480, 640), np.uint8))
    with pytest.raises(InputError) as err:
        open_frames(str(tmp_path), expected_size=(1280, 1024), name="left images")
    assert str(err.value) == "left images: frame_0001.png is 640x480 px but the rig expects 1280x1024 px"


def test_garbage_and_truncated_png_headers_name_the_file(tmp_path):
    _write_pngs(tmp_path, ["a.png"])
    (tmp_path / "b.png").write_bytes(b"this is not a picture" * 4)
    with pytest.raises(InputError, match=r"b\.png is not a valid PNG file"):
        open_frames(str(tmp_path))
    (tmp_path / "b.png").write_bytes((tmp_path / "a.png").read_bytes()[:20])
    with pytest.raises(InputError, match=r"b\.png"):
        open_frames(str(tmp_path))


def test_png_truncated_in_its_data_fails_when_read(tmp_path):
    _write_pngs(tmp_path, ["f_1.png", "f_2.png", "f_3.png"])
    whole = (tmp_path / "f_2.png").read_bytes()
    (tmp_path / "f_2.png").write_bytes(whole[: len(whole) // 2])
    seq = open_frames(str(tmp_path), name="left images")  # headers are intact
    assert len(seq) == 3
    np.testing.assert_array_equal(seq.read_raw(2), cv2.imread(str(tmp_path / "f_3.png"), cv2.IMREAD_UNCHANGED))
    with pytest.raises(InputError, match=r"^left images: f_2\.png cannot be decoded"):
        seq.read_raw(1)


def test_bmp_sizes_are_checked_when_read(tmp_path):
    cv2.imwrite(str(tmp_path / "a.bmp"), _grey(0))
    cv2.imwrite(str(tmp_path / "b.bmp"), _grey(1, size=(20, 10)))
    seq = open_frames(str(tmp_path))  # only the first BMP is decoded up front
    assert seq.size == (W, H)
    with pytest.raises(InputError, match=r"b\.bmp is 20x10 px but a\.bmp is 40x30 px"):
        seq.read_raw(1)


def test_float_tiff_is_refused(tmp_path):
    tifffile.imwrite(tmp_path / "f.tif", np.zeros((H, W), np.float32))
    with pytest.raises(InputError, match=r"f\.tif holds 32-bit floating-point samples"):
        open_frames(str(tmp_path / "f.tif"))


def test_no_files_match(tmp_path):
    pattern = str(tmp_path / "nothing_*.png")
    with pytest.raises(InputError) as err:
        open_frames(pattern, name="left images")
    assert str(err.value) == f"left images: no files match '{pattern}'"


def test_empty_folder(tmp_path):
    with pytest.raises(InputError, match="holds no image files"):
        open_frames(str(tmp_path))


def test_missing_list_entry_names_it_and_the_list(tmp_path, monkeypatch):
    _write_pngs(tmp_path, ["a.png"])
    (tmp_path / "run.txt").write_text("a.png\nb.png\n")
    monkeypatch.chdir(tmp_path)
    with pytest.raises(InputError) as err:
        open_frames("@run.txt", name="left images")
    assert str(err.value) == "left images: b.png, named in list run.txt, does not exist"


def test_pair_frames_count_mismatch(tmp_path):
    _write_pngs(tmp_path / "L", [f"f_{k}.png" for k in range(3)])
    _write_pngs(tmp_path / "R", [f"f_{k}.png" for k in range(2)])
    left = open_frames(str(tmp_path / "L"), name="left images")
    right = open_frames(str(tmp_path / "R"), name="right images")
    pair_frames(left, left)
    with pytest.raises(InputError) as err:
        pair_frames(left, right)
    assert str(err.value) == "left images: 3 frames but right images: 2 frames; frames are paired by index"


# ---------------------------------------------------------------- laziness


def test_reading_one_frame_decodes_only_that_file(tmp_path, monkeypatch):
    _write_pngs(tmp_path, [f"f_{k}.png" for k in range(5)])
    decoded = []
    real_imread = cv2.imread
    monkeypatch.setattr(cv2, "imread", lambda path, flags: decoded.append(path) or real_imread(path, flags))
    seq = open_frames(str(tmp_path))
    assert decoded == []  # construction read PNG headers only
    seq.read_raw(2)
    assert decoded == [str(tmp_path / "f_2.png")]


def test_tiff_construction_reads_no_pixel_data(tmp_path, monkeypatch):
    tifffile.imwrite(tmp_path / "run.tif", np.stack([_grey(k) for k in range(3)]), photometric="minisblack")
    calls = []
    real_asarray = tifffile.TiffPage.asarray
    monkeypatch.setattr(tifffile.TiffPage, "asarray",
                        lambda page, *a, **kw: calls.append(page.index) or real_asarray(page, *a, **kw))
    with open_frames(str(tmp_path / "run.tif")) as seq:
        assert calls == []
        seq.read_raw(1)
        assert calls == [1]


def test_sequence_survives_pickling(tmp_path):
    import pickle

    tifffile.imwrite(tmp_path / "run.tif", np.stack([_grey(k) for k in range(2)]), photometric="minisblack")
    seq = open_frames(str(tmp_path / "run.tif"))
    seq.read_raw(0)  # leaves the TIFF open
    clone = pickle.loads(pickle.dumps(seq))
    assert isinstance(clone, FrameSequence)
    np.testing.assert_array_equal(clone.read_raw(1), seq.read_raw(1))
    seq.close()


# ---------------------------------------------------------------- writing


@pytest.mark.parametrize("suffix", [".png", ".tif"])
def test_save_image_round_trip(tmp_path, suffix):
    raw = _grey(7, 65536, np.uint16)
    save_image(tmp_path / f"out{suffix}", raw)
    np.testing.assert_array_equal(open_frames(str(tmp_path / f"out{suffix}")).read_raw(0), raw)


def test_save_image_failure_raises_oserror(tmp_path):
    with pytest.raises(OSError, match="missing"):
        save_image(tmp_path / "missing" / "out.png", _grey(0))
    with pytest.raises(ValueError):
        save_image(tmp_path / "out.png", np.zeros((H, W), np.float32))


def test_module_logger_name():
    assert images.log.name == "surfrec.io.images"
