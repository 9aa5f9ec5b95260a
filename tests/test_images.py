"""Tests for bos.images: formats, luminance, EXIF, pair checks, masks, bad input.

Oracles: arrays we write ourselves with general-purpose writers (Pillow,
imageio, tifffile, PyAV, and a minimal PNG encoder written from the PNG
specification, W3C/ISO 15948), the Rec. 709 luminance weights (ITU-R
BT.709-6, item 3.2, from memory), analytic linearity for RAW, and
matplotlib's point-in-polygon test for polygon masks.
"""

from __future__ import annotations

import struct
import warnings
import zlib

import numpy as np
import pytest
import tifffile
from PIL import Image, TiffImagePlugin

from bos.errors import DataFileError, InputError
from bos.images import (
    BitDepthMismatchWarning,
    ImageData,
    LossyInputWarning,
    check_pair,
    combine_masks,
    iter_frames,
    polygon_mask,
    read_image,
    read_mask,
    read_pair,
)

REC709 = (0.2126, 0.7152, 0.0722)  # ITU-R BT.709-6 luminance coefficients (from memory)


def _rng():
    return np.random.default_rng(1234)


def _one_line(exc_info) -> str:
    msg = str(exc_info.value)
    assert "\n" not in msg and "Traceback" not in msg
    return msg


def _write_png16_rgb(path, rgb):
    """Minimal 16-bit RGB PNG encoder (filter 0 on every row), per the PNG spec."""
    h, w, _ = rgb.shape
    raw = b"".join(b"\x00" + rgb[r].astype(">u2").tobytes() for r in range(h))

    def chunk(tag, data):
        return struct.pack(">I", len(data)) + tag + data + struct.pack(">I", zlib.crc32(tag + data) & 0xFFFFFFFF)

    ihdr = struct.pack(">IIBBBBB", w, h, 16, 2, 0, 0, 0)
    path.write_bytes(b"\x89PNG\r\n\x1a\n" + chunk(b"IHDR", ihdr) + chunk(b"IDAT", zlib.compress(raw)) + chunk(b"IEND", b""))


# --------------------------------------------------------------------------- formats


def test_png_8_and_16_bit_grey_scaled_to_unit_range(tmp_path):
    rng = _rng()
    a16 = (rng.random((30, 40)) * 65535).astype(np.uint16)
    a8 = (rng.random((30, 40)) * 255).astype(np.uint8)
    Image.fromarray(a16).save(tmp_path / "g16.png")
    Image.fromarray(a8).save(tmp_path / "g8.png")
    im16 = read_image(tmp_path / "g16.png")
    im8 = read_image(tmp_path / "g8.png")
    assert im16.bit_depth == 16 and im8.bit_depth == 8
    assert not im16.lossy and im16.n_frames == 1 and im16.source == (str(tmp_path / "g16.png"), 0)
    np.testing.assert_array_equal(im16.data, a16 / 65535.0)
    np.testing.assert_array_equal(im8.data, a8 / 255.0)
    assert im16.data.dtype == np.float64


def test_png16_colour_keeps_16_bits_and_uses_rec709(tmp_path):
    rng = _rng()
    rgb = (rng.random((12, 17, 3)) * 65535).astype(np.uint16)
    _write_png16_rgb(tmp_path / "c16.png", rgb)
    im = read_image(tmp_path / "c16.png")
    expect = (REC709[0] * rgb[..., 0] + REC709[1] * rgb[..., 1] + REC709[2] * rgb[..., 2]) / 65535.0
    assert im.bit_depth == 16
    np.testing.assert_allclose(im.data, expect, rtol=0, atol=1e-12)
    np.testing.assert_array_equal(read_image(tmp_path / "c16.png", channel="blue").data, rgb[..., 2] / 65535.0)


def test_srgb_linearize_option(tmp_path):
    # sRGB decoding curve, IEC 61966-2-1: 128/255 -> 0.2158605 (common check value, from memory)
    Image.fromarray(np.full((4, 4), 128, np.uint8)).save(tmp_path / "mid.png")
    assert read_image(tmp_path / "mid.png").data[0, 0] == pytest.approx(128 / 255)
    assert read_image(tmp_path / "mid.png", linearize=True).data[0, 0] == pytest.approx(0.2158605, abs=1e-6)


def test_tiff_multipage_float_and_planar(tmp_path):
    rng = _rng()
    stack = (rng.random((3, 10, 14)) * 65535).astype(np.uint16)
    tifffile.imwrite(tmp_path / "stack.tif", stack, photometric="minisblack")  # 3 pages
    im = read_image(tmp_path / "stack.tif", frame=2)
    assert im.n_frames == 3 and im.source[1] == 2 and im.bit_depth == 16
    np.testing.assert_array_equal(im.data, stack[2] / 65535.0)
    np.testing.assert_array_equal(read_image(tmp_path / "stack.tif").data, stack[0] / 65535.0)
    pages = list(iter_frames(tmp_path / "stack.tif"))
    assert [p.source[1] for p in pages] == [0, 1, 2]
    np.testing.assert_array_equal(pages[1].data, stack[1] / 65535.0)

    f = rng.normal(size=(10, 14)).astype(np.float32)
    tifffile.imwrite(tmp_path / "f.tif", f)
    imf = read_image(tmp_path / "f.tif")
    assert imf.bit_depth == 32
    np.testing.assert_array_equal(imf.data, f.astype(np.float64))

    # planar (separate) planes: the layout tifffile gives a (3, rows, cols) stack by default, so
    # they may be three frames; mixing them as colour would be nonsense: a plane must be chosen
    planes = (rng.random((3, 10, 14)) * 255).astype(np.uint8)
    tifffile.imwrite(tmp_path / "planar.tif", planes, photometric="rgb", planarconfig="separate")
    with pytest.raises(InputError, match="separate image planes"):
        read_image(tmp_path / "planar.tif")
    imp = read_image(tmp_path / "planar.tif", frame=1)
    assert imp.n_frames == 3
    np.testing.assert_array_equal(imp.data, planes[1] / 255.0)
    with pytest.raises(InputError, match="out of range"):
        read_image(tmp_path / "planar.tif", frame=3)
    extra = (rng.random((10, 14, 3)) * 255).astype(np.uint8)   # grey with extra samples
    tifffile.imwrite(tmp_path / "extra.tif", extra, photometric="minisblack", planarconfig="contig")
    with pytest.raises(InputError, match="separate image planes"):
        read_image(tmp_path / "extra.tif")
    np.testing.assert_array_equal(read_image(tmp_path / "extra.tif", frame=2).data, extra[..., 2] / 255.0)


def test_jpeg_lossy_flag_warning_and_exif(tmp_path):
    rng = _rng()
    a = (rng.random((32, 32)) * 200 + 20).astype(np.uint8)
    exif = Image.Exif()
    exif[272] = "BenchCam 7"  # Model
    ifd = exif.get_ifd(0x8769)
    ifd[37386] = TiffImagePlugin.IFDRational(85, 1)  # FocalLength, mm
    ifd[33437] = TiffImagePlugin.IFDRational(56, 10)  # FNumber
    ifd[33434] = TiffImagePlugin.IFDRational(1, 250)  # ExposureTime, s
    Image.fromarray(a).save(tmp_path / "p.jpg", quality=100, exif=exif)
    with pytest.warns(LossyInputWarning, match="lossy"):
        im = read_image(tmp_path / "p.jpg")
    assert im.lossy and im.bit_depth == 8
    assert im.exif == {"focal_length_m": pytest.approx(0.085), "f_number": pytest.approx(5.6),
                       "exposure_s": pytest.approx(0.004), "camera_model": "BenchCam 7"}
    # quality 100 JPEG of an 8-bit image: errors of a few grey levels at most (common practice)
    assert np.max(np.abs(im.data * 255 - a)) <= 4


def _write_cfa_dng(path, cfa, white=4095):
    """Minimal CFA DNG (TIFF/EP + DNG 1.4 tags) written with tifffile."""
    tags = [
        (50706, "B", 4, (1, 4, 0, 0), True),  # DNGVersion
        (50707, "B", 4, (1, 1, 0, 0), True),  # DNGBackwardVersion
        (50708, "s", 0, "Test CFA Camera", True),  # UniqueCameraModel
        (33421, "H", 2, (2, 2), True),  # CFARepeatPatternDim
        (33422, "B", 4, (0, 1, 1, 2), True),  # CFAPattern RGGB
        (50710, "B", 3, (0, 1, 2), True),  # CFAPlaneColor
        (50711, "H", 1, 1, True),  # CFALayout rectangular
        (50714, "H", 1, 0, True),  # BlackLevel
        (50717, "H", 1, white, True),  # WhiteLevel
        (50721, "2i", 9, (1, 1, 0, 1, 0, 1, 0, 1, 1, 1, 0, 1, 0, 1, 0, 1, 1, 1), True),  # ColorMatrix1
        (50728, "2I", 3, (1, 1, 1, 1, 1, 1), True),  # AsShotNeutral
    ]
    tifffile.imwrite(path, cfa, photometric=32803, subfiletype=0, extratags=tags, metadata=None)


def test_raw_dng_is_linear(tmp_path):
    # Linearity oracle: doubling the light on every photosite doubles the output
    # (a gamma curve would give 2**(1/2.2) = 1.37 instead).
    h, w = 32, 48
    _write_cfa_dng(tmp_path / "dim.dng", np.full((h, w), 600, np.uint16))
    _write_cfa_dng(tmp_path / "bright.dng", np.full((h, w), 1200, np.uint16))
    dim = read_image(tmp_path / "dim.dng")
    bright = read_image(tmp_path / "bright.dng")
    assert dim.data.shape == (h, w) and dim.bit_depth == 12 and not dim.lossy
    inner = (slice(4, -4), slice(4, -4))
    ratio = np.median(bright.data[inner]) / np.median(dim.data[inner])
    assert ratio == pytest.approx(2.0, rel=0.01)
    assert 0.0 < np.median(bright.data[inner]) < 1.0


def test_video_frames_and_lossy_flag(tmp_path):
    import imageio.v3 as iio

    levels = [40, 80, 120, 160, 200]
    frames = np.stack([np.full((32, 48, 3), v, np.uint8) for v in levels])
    path = tmp_path / "clip.mp4"
    iio.imwrite(path, frames, plugin="pyav", codec="libx264", fps=10)
    with pytest.warns(LossyInputWarning):
        third = read_image(path, frame=3)
    assert third.n_frames == 5 and third.lossy and third.source[1] == 3
    # flat grey frames survive H.264 + limited-range YUV to within a few levels (common practice)
    assert np.mean(third.data) * 255 == pytest.approx(160, abs=3)
    with pytest.warns(LossyInputWarning):
        means = [np.mean(f.data) * 255 for f in iter_frames(path)]
    np.testing.assert_allclose(means, levels, atol=3)

    iio.imwrite(tmp_path / "clip.mkv", frames, plugin="pyav", codec="ffv1", fps=10)
    with warnings.catch_warnings():
        warnings.simplefilter("error", LossyInputWarning)
        lossless = read_image(tmp_path / "clip.mkv", frame=4)
    assert lossless.n_frames == 5 and not lossless.lossy
    with pytest.raises(InputError, match="frame 5 out of range"):
        read_image(path, frame=5)


# --------------------------------------------------------------------------- pair checks and bad input


def test_missing_and_corrupt_files(tmp_path):
    with pytest.raises(DataFileError, match="file not found") as e:
        read_image(tmp_path / "nope.png")
    _one_line(e)
    (tmp_path / "junk.png").write_bytes(_rng().integers(0, 256, 500, dtype=np.uint8).tobytes())
    with pytest.raises(DataFileError, match="cannot read image .*junk.png") as e:
        read_image(tmp_path / "junk.png")
    _one_line(e)
    for name in ("junk.tif", "junk.dng", "junk.mp4"):
        (tmp_path / name).write_bytes(b"not an image at all" * 10)
        with pytest.raises(DataFileError, match=f"cannot read image .*{name}") as e:
            read_image(tmp_path / name)
        _one_line(e)
    with pytest.raises(InputError, match="unknown channel"):
        read_image(tmp_path / "junk.png", channel="alpha")


def test_non_finite_tiff_refused(tmp_path):
    f = np.ones((8, 8), np.float32)
    f[2, 3] = np.nan
    f[5, 5] = np.inf
    tifffile.imwrite(tmp_path / "nan.tif", f)
    with pytest.raises(InputError, match="2 non-finite") as e:
        read_image(tmp_path / "nan.tif")
    _one_line(e)
    bad = ImageData(data=f.astype(float), bit_depth=32, lossy=False, source=("x", 0))
    good = ImageData(data=np.ones((8, 8)), bit_depth=32, lossy=False, source=("y", 0))
    with pytest.raises(InputError, match="measurement image x has 2 non-finite"):
        check_pair(good, bad)


def test_read_pair_matches_two_reads_with_warnings_and_errors_in_order(tmp_path):
    rng = _rng()
    a16 = (rng.random((40, 50)) * 65535).astype(np.uint16)
    b8 = (rng.random((40, 50)) * 255).astype(np.uint8)
    Image.fromarray(a16).save(tmp_path / "ref.png")
    Image.fromarray(b8).save(tmp_path / "meas.jpg", quality=100)
    with pytest.warns(LossyInputWarning, match="meas.jpg"):
        ref, meas = read_pair(tmp_path / "ref.png", tmp_path / "meas.jpg")
    np.testing.assert_array_equal(ref.data, a16 / 65535.0)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", LossyInputWarning)
        single = read_image(tmp_path / "meas.jpg")
    np.testing.assert_array_equal(meas.data, single.data)
    assert (ref.bit_depth, meas.bit_depth, ref.lossy, meas.lossy) == (16, 8, False, True)
    # frames of one multi-page file, chosen separately
    stack = (rng.random((3, 10, 14)) * 65535).astype(np.uint16)
    tifffile.imwrite(tmp_path / "stack.tif", stack, photometric="minisblack")
    r, m = read_pair(tmp_path / "stack.tif", tmp_path / "stack.tif", reference_frame=0, measurement_frame=2)
    np.testing.assert_array_equal(r.data, stack[0] / 65535.0)
    np.testing.assert_array_equal(m.data, stack[2] / 65535.0)
    # both files bad: the reference's error comes first, as with two sequential reads
    with pytest.raises(DataFileError, match="not found: .*nothing-ref.png") as e:
        read_pair(tmp_path / "nothing-ref.png", tmp_path / "nothing-meas.png")
    _one_line(e)
    with pytest.raises(InputError, match="frame 5 out of range"):
        read_pair(tmp_path / "ref.png", tmp_path / "stack.tif", measurement_frame=5)


def test_png_exif_chunk_read_and_absent(tmp_path):
    a = (_rng().random((16, 16)) * 255).astype(np.uint8)
    exif = Image.Exif()
    exif[272] = "PngCam"  # Model
    exif.get_ifd(0x8769)[37386] = TiffImagePlugin.IFDRational(50, 1)  # FocalLength, mm
    Image.fromarray(a).save(tmp_path / "e.png", exif=exif)
    Image.fromarray(a).save(tmp_path / "n.png")
    assert read_image(tmp_path / "e.png").exif == {"focal_length_m": pytest.approx(0.050), "camera_model": "PngCam"}
    assert read_image(tmp_path / "n.png").exif == {}


def test_pair_size_mismatch_and_bit_depth_mix(tmp_path):
    rng = _rng()
    Image.fromarray((rng.random((20, 30)) * 255).astype(np.uint8)).save(tmp_path / "a8.png")
    Image.fromarray((rng.random((20, 30)) * 65535).astype(np.uint16)).save(tmp_path / "b16.png")
    Image.fromarray((rng.random((21, 30)) * 65535).astype(np.uint16)).save(tmp_path / "c16.png")
    a8, b16, c16 = (read_image(tmp_path / n) for n in ("a8.png", "b16.png", "c16.png"))
    with pytest.raises(InputError, match="reference .*b16.png is 20x30 .* measurement .*c16.png is 21x30") as e:
        check_pair(b16, c16)
    _one_line(e)
    with pytest.warns(BitDepthMismatchWarning, match="8-bit, measurement 16-bit"):
        check_pair(a8, b16)
    # both already on the same [0, 1] scale
    assert 0.0 <= a8.data.min() and a8.data.max() <= 1.0 and b16.data.max() <= 1.0
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        check_pair(b16, b16)


# --------------------------------------------------------------------------- masks


def test_read_mask_and_wrong_size(tmp_path):
    m = np.zeros((20, 30), np.uint8)
    m[5:9, 10:25] = 255
    Image.fromarray(m).save(tmp_path / "m.png")
    rgba = np.zeros((20, 30, 4), np.uint8)
    rgba[..., 3] = 255  # opaque everywhere, but only the red box counts
    rgba[2:4, 3:6, 0] = 10
    Image.fromarray(rgba).save(tmp_path / "rgba.png")
    np.testing.assert_array_equal(read_mask(tmp_path / "m.png", shape=(20, 30)), m != 0)
    got = read_mask(tmp_path / "rgba.png", shape=(20, 30))
    assert got.sum() == 6 and got[2:4, 3:6].all()
    with pytest.raises(InputError, match=r"mask .*m.png is 20x30 .* images are 40x30") as e:
        read_mask(tmp_path / "m.png", shape=(40, 30))
    _one_line(e)
    with pytest.raises(DataFileError, match="file not found"):
        read_mask(tmp_path / "none.png", shape=(20, 30))


def test_polygon_mask_against_matplotlib_path():
    from matplotlib.path import Path as MplPath

    shape = (40, 50)
    tri = [(5.3, 4.1), (44.7, 12.2), (14.9, 35.6)]  # (x, y) = (col, row)
    mask = polygon_mask([tri], shape=shape)
    rows, cols = np.mgrid[0 : shape[0], 0 : shape[1]]
    centres = np.column_stack([cols.ravel(), rows.ravel()]).astype(float)
    path = MplPath(np.array(tri))
    inside = path.contains_points(centres).reshape(shape)
    # pixels whose centre lies > 0.5 px from every edge must agree exactly
    interior = path.contains_points(centres, radius=-1.0).reshape(shape) | ~path.contains_points(
        centres, radius=1.0
    ).reshape(shape)
    diff = (mask != inside) & interior
    assert not diff.any()
    area = 0.5 * abs((44.7 - 5.3) * (35.6 - 4.1) - (14.9 - 5.3) * (12.2 - 4.1))  # shoelace formula
    assert mask.sum() == pytest.approx(area, rel=0.06)
    # polygons off the image are clipped; union with a file-style mask
    box = polygon_mask([[(-5, -5), (3, -5), (3, 2), (-5, 2)]], shape=shape)
    assert box.sum() == 4 * 3 and box[:3, :4].all()
    both = combine_masks(mask, None, box)
    np.testing.assert_array_equal(both, mask | box)
    assert combine_masks(None, None) is None
    with pytest.raises(InputError, match="cannot combine masks"):
        combine_masks(mask, np.zeros((3, 3), bool))
    with pytest.raises(InputError, match="polygon 0 needs at least 3"):
        polygon_mask([[(0, 0), (1, 1)]], shape=shape)
