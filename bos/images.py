"""Reading background photographs: formats, luminance, EXIF, pair checks, masks.

Every reader returns an :class:`ImageData` whose ``data`` is a 2-D float64
array indexed (row, col) = (y, x):

* integer pixels are scaled to [0, 1] by the full range of their container
  (``value / 255`` for 8-bit, ``value / 65535`` for 16-bit), so an 8-bit and a
  16-bit picture of the same scene have the same numbers;
* float TIFF pixels are kept as stored (bit depth reported as 32);
* colour is reduced to one channel with the Rec. 709 luminance weights
  (0.2126 R + 0.7152 G + 0.0722 B, the weights of linear sRGB primaries).
  Gamma-encoded 8-bit files (JPEG, PNG, video) are *not* linearised by
  default: the displacement only needs texture, and decoding the sRGB curve
  stretches the coarse 8-bit steps in the dark parts.  ``linearize=True``
  applies the sRGB decoding curve (IEC 61966-2-1) first;
* camera RAW is demosaicked by LibRaw (through rawpy) with a linear curve
  (``gamma=(1, 1)``), no automatic brightening, 16-bit output, the camera's
  white balance and no rotation, so ``data`` is proportional to the light on
  each sensor pixel at the full sensor resolution.

Formats: JPEG, PNG (8/16-bit; 16-bit colour PNG is decoded with PyAV because
Pillow truncates it to 8 bits), TIFF (8/16-bit, float, multi-page via
tifffile), camera RAW (DNG, CR2, NEF, ARW ... via rawpy), video (MP4, MOV,
AVI, MKV via imageio's ``pyav`` plugin) and whatever else Pillow opens.

All failures a user can cause raise :mod:`bos.errors` types with one-line
messages: a missing file -> ``DataFileError("file not found: ...")``, an
unreadable one -> ``DataFileError("cannot read image ...: <reason>")``.
"""

from __future__ import annotations

import functools
import math
import os
import warnings
from dataclasses import dataclass, field
from pathlib import Path
from typing import Iterator, Sequence

import numpy as np

from .errors import DataFileError, InputError

__all__ = [
    "ImageData",
    "LossyInputWarning",
    "BitDepthMismatchWarning",
    "LUMINANCE_WEIGHTS",
    "RAW_SUFFIXES",
    "VIDEO_SUFFIXES",
    "read_image",
    "read_pair",
    "iter_frames",
    "check_pair",
    "read_mask",
    "polygon_mask",
    "combine_masks",
]

#: Rec. 709 / linear-sRGB luminance weights for (R, G, B) (ITU-R BT.709-6, item 3.2).
LUMINANCE_WEIGHTS = (0.2126, 0.7152, 0.0722)
_CHANNELS = {"red": 0, "green": 1, "blue": 2}

RAW_SUFFIXES = frozenset(
    ".dng .cr2 .cr3 .crw .nef .nrw .arw .srf .sr2 .raf .orf .rw2 .pef .srw .3fr .iiq .erf .kdc .dcr .mrw .x3f .rwl".split()
)
VIDEO_SUFFIXES = frozenset(".mp4 .mov .avi .mkv .m4v .webm .wmv .mpg .mpeg".split())
_TIFF_SUFFIXES = frozenset({".tif", ".tiff"})
_LOSSY_SUFFIXES = frozenset({".jpg", ".jpeg", ".jpe", ".jfif", ".webp", ".heic", ".avif"})
# Video codecs that store frames without loss; everything else counts as lossy.
_LOSSLESS_CODECS = frozenset({"ffv1", "rawvideo", "png", "huffyuv", "ffvhuff", "utvideo", "qtrle", "tiff", "r210", "v210"})
# TIFF compression schemes that lose information (JPEG, old-style JPEG, JPEG XR, lossy JPEG 2000/JPEG XL, WebP).
_LOSSY_TIFF_COMPRESSION = frozenset({6, 7, 22610, 33003, 33005, 34712, 34892, 50001, 50002})


class LossyInputWarning(UserWarning):
    """A lossy-compressed image (JPEG, lossy video ...) is being used."""


class BitDepthMismatchWarning(UserWarning):
    """The reference and measurement images have different bit depths."""


@dataclass
class ImageData:
    """One single-channel image read from a file.

    Attributes
    ----------
    data : ndarray
        2-D float64, (row, col).  Integer pixels scaled to [0, 1] by the
        container range; float TIFF kept as stored; RAW linear.
    bit_depth : int
        Container bits per sample: 8, 16 (PNG/TIFF/video), the sensor's bit
        depth for RAW (from its white level, e.g. 12 or 14), or 32 for float.
    lossy : bool
        True for JPEG, lossy TIFF compression and lossy video codecs.
    source : tuple
        (path as str, frame index).
    exif : dict
        ``focal_length_m``, ``f_number``, ``exposure_s``, ``camera_model``
        where the file carries them (explicit settings win in the pipeline).
    n_frames : int
        Number of frames/pages in the file (1 for still images).
    """

    data: np.ndarray
    bit_depth: int
    lossy: bool
    source: tuple[str, int]
    exif: dict = field(default_factory=dict)
    n_frames: int = 1

    @property
    def shape(self) -> tuple[int, int]:
        return self.data.shape  # type: ignore[return-value]


# --------------------------------------------------------------------------- helpers


def _one_line(exc: BaseException) -> str:
    text = " ".join(str(exc).split())
    return text or type(exc).__name__


def _cannot_read(path: Path, exc: BaseException | str) -> DataFileError:
    reason = exc if isinstance(exc, str) else _one_line(exc)
    return DataFileError(f"cannot read image {path}: {reason}")


def _check_exists(path: str | os.PathLike) -> Path:
    p = Path(path)
    if not p.exists():
        raise DataFileError(f"file not found: {p}")
    if p.is_dir():
        raise DataFileError(f"cannot read image {p}: it is a directory")
    return p


def _srgb_to_linear(v: np.ndarray) -> np.ndarray:
    """sRGB decoding curve (IEC 61966-2-1) for values in [0, 1]."""
    return np.where(v <= 0.04045, v / 12.92, ((v + 0.055) / 1.055) ** 2.4)


def _scale(arr: np.ndarray) -> tuple[np.ndarray, int]:
    """Integer -> [0, 1] by container range; float kept.  Returns (float64, bit depth)."""
    if arr.dtype == np.bool_:
        return arr.astype(np.float64), 8
    if arr.dtype.kind == "u" and arr.dtype.itemsize in (1, 2):
        bits = 8 * arr.dtype.itemsize
        out = arr.astype(np.float64)  # one conversion straight to the final type,
        out /= float(2**bits - 1)  # then an in-place division (same values as arr / (2**bits - 1))
        return out, bits
    if arr.dtype.kind == "f":
        return arr.astype(np.float64), 32
    raise ValueError(f"unsupported pixel type {arr.dtype} (need 8/16-bit unsigned integer or float)")


def _to_single(rgb: np.ndarray, channel: str, *, linearize: bool) -> np.ndarray:
    """(rows, cols[, channels]) float -> 2-D with the chosen channel rule."""
    if rgb.ndim == 2:
        return _srgb_to_linear(rgb) if linearize else rgb
    if rgb.ndim != 3:
        raise ValueError(f"unexpected image array shape {rgb.shape}")
    nc = rgb.shape[2]
    if nc in (2, 4):  # grey+alpha, RGBA: drop alpha
        rgb = rgb[..., : nc - 1]
        nc -= 1
    if nc == 1:
        out = rgb[..., 0]
        return _srgb_to_linear(out) if linearize else out
    if nc != 3:
        raise ValueError(f"unexpected number of colour channels: {nc}")
    if linearize:
        rgb = _srgb_to_linear(rgb)
    if channel == "luminance":
        w = LUMINANCE_WEIGHTS
        return w[0] * rgb[..., 0] + w[1] * rgb[..., 1] + w[2] * rgb[..., 2]
    return rgb[..., _CHANNELS[channel]]


def _frame_index(frame: int | None, n_frames: int, path: Path) -> int:
    idx = 0 if frame is None else frame
    if isinstance(idx, bool) or not isinstance(idx, (int, np.integer)):
        raise InputError(f"frame must be an integer, got {frame!r}")
    if n_frames and not 0 <= idx < n_frames:
        raise InputError(f"frame {idx} out of range: {path} has {n_frames} frame(s)")
    return int(idx)


def _exif_from_mapping(ifd0: dict, exif_ifd: dict) -> dict:
    """Pick the rig-related EXIF entries (tag numbers from the EXIF 2.3 standard)."""
    out: dict = {}

    def num(v):
        try:
            if isinstance(v, tuple) and len(v) == 2:  # (numerator, denominator)
                v = v[0] / v[1]
            f = float(v)
        except (TypeError, ValueError, ZeroDivisionError):
            return None
        return f if math.isfinite(f) and f > 0 else None

    fl = num(exif_ifd.get(37386))  # FocalLength, mm
    if fl is not None:
        out["focal_length_m"] = fl / 1000.0
    fn = num(exif_ifd.get(33437))  # FNumber
    if fn is not None:
        out["f_number"] = fn
    ex = num(exif_ifd.get(33434))  # ExposureTime, s
    if ex is not None:
        out["exposure_s"] = ex
    model = ifd0.get(272)  # Model
    if isinstance(model, bytes):
        model = model.decode("latin-1", "replace")
    if isinstance(model, str) and model.strip("\x00 "):
        out["camera_model"] = model.strip("\x00 ")
    return out


def _png_has_exif_chunk(path: Path) -> bool:
    """True if the PNG file has an ``eXIf`` chunk (or is not a well-formed PNG: let Pillow decide).

    Walks the chunk headers only (length, type; PNG specification, W3C/ISO 15948, section 5.3) and
    skips the data, so a 38 MB image costs a few hundred small reads instead of a full decode.
    """
    with open(path, "rb") as fh:
        if fh.read(8) != b"\x89PNG\r\n\x1a\n":
            return True
        while True:
            head = fh.read(8)
            if len(head) < 8:
                return True
            length, kind = int.from_bytes(head[:4], "big"), head[4:]
            if kind == b"eXIf":
                return True
            if kind == b"IEND":
                return False
            fh.seek(length + 4, os.SEEK_CUR)  # data + CRC


def _read_exif(path: Path) -> dict:
    """EXIF via Pillow; for TIFF-based files Pillow cannot open, via tifffile tags."""
    from PIL import Image

    try:
        if path.suffix.lower() == ".png" and not _png_has_exif_chunk(path):
            return {}  # Pillow's getexif() on a PNG decodes the whole image just to look for eXIf
        with Image.open(path) as im:
            exif = im.getexif()
            return _exif_from_mapping(dict(exif), dict(exif.get_ifd(0x8769)))
    except Exception:  # noqa: BLE001 - EXIF is optional; any failure means "none"
        pass
    try:
        import tifffile

        with tifffile.TiffFile(path) as tif:
            tags = tif.pages[0].tags
            ifd0 = {t.code: t.value for t in tags.values()}
            exif_ifd = ifd0.get(34665) if isinstance(ifd0.get(34665), dict) else {}
            named = {"FocalLength": 37386, "FNumber": 33437, "ExposureTime": 33434}
            exif_codes = {named[k]: v for k, v in exif_ifd.items() if k in named}
            return _exif_from_mapping(ifd0, exif_codes)
    except Exception:  # noqa: BLE001
        return {}


# --------------------------------------------------------------------------- format readers
# Each returns (array as stored, n_frames, lossy, bit_depth override or None).


def _read_tiff(path: Path, frame: int | None):
    import tifffile

    with tifffile.TiffFile(path) as tif:
        pages = tif.pages
        n = len(pages)
        page = pages[0 if n == 1 else _frame_index(frame, n, path)]
        axes = getattr(page, "axes", "")
        samples = int(getattr(page, "samplesperpixel", 1) or 1)
        photometric = int(getattr(page, "photometric", 1) or 1)
        lossy = int(page.compression) in _LOSSY_TIFF_COMPRESSION
        arr = page.asarray()
        if samples > 1 and (axes.startswith("S") or photometric in (0, 1)):
            # separate sample planes: the layout a numpy stack of frames gets by default (or grey
            # extra samples).  Mixing frames as colour gives nonsense, so a plane must be chosen.
            if n == 1 and frame is not None:
                idx = _frame_index(frame, samples, path)
                planes = arr if axes.startswith("S") else np.moveaxis(arr, -1, 0)
                return planes[idx], samples, lossy, idx
            raise InputError(
                f"{path} holds {samples} separate image planes in one page (a stack of frames, or colour "
                "planes): choose one with images.frame (or images.reference_frame / images.measurement_frame), "
                "or save colour pictures with interleaved channels")
        idx = _frame_index(frame, n, path)
    return arr, n, lossy, idx


def _png_16bit_colour_type(path: Path) -> int | None:
    """PNG colour type (2 = RGB, 6 = RGBA) if the file is a 16-bit colour PNG, else None."""
    with open(path, "rb") as fh:
        head = fh.read(26)
    if len(head) == 26 and head[:8] == b"\x89PNG\r\n\x1a\n" and head[24] == 16 and head[25] in (2, 6):
        return head[25]
    return None


def _read_png16_colour(path: Path, colour_type: int) -> np.ndarray:
    import av

    with av.open(str(path)) as container:
        fr = next(container.decode(video=0))
        return fr.to_ndarray(format="rgba64le" if colour_type == 6 else "rgb48le")


def _read_pillow(path: Path, frame: int | None):
    from PIL import Image

    colour_type = _png_16bit_colour_type(path) if path.suffix.lower() == ".png" else None
    if colour_type is not None:
        # Pillow decodes 16-bit colour PNG to 8 bits; FFmpeg (PyAV) keeps 16.
        return _read_png16_colour(path, colour_type), 1, False, _frame_index(frame, 1, path)
    with Image.open(path) as im:
        n = int(getattr(im, "n_frames", 1))
        idx = _frame_index(frame, n, path)
        if idx:
            im.seek(idx)
        lossy = im.format in ("JPEG", "MPO", "WEBP") and not getattr(im, "lossless", False)
        if im.mode in ("P", "PA", "CMYK", "YCbCr", "LAB", "HSV", "1"):
            im = im.convert("RGBA" if "A" in im.mode or "transparency" in im.info else "RGB")
        if im.mode in ("I;16", "I;16B", "I;16L", "I;16N"):
            arr = np.asarray(im).astype(np.uint16, copy=False)  # native order; no copy when it is already
        elif im.mode == "I":  # 16-bit greyscale PNG is opened as 32-bit 'I'
            arr = np.asarray(im)
            if arr.min() < 0 or arr.max() > 65535:
                raise ValueError("32-bit integer pixels are not supported")
            arr = arr.astype(np.uint16)
        else:
            arr = np.asarray(im)
    return arr, n, lossy, idx


def _read_raw(path: Path, frame: int | None):
    import rawpy

    idx = _frame_index(frame, 1, path)
    with rawpy.imread(str(path)) as raw:
        rgb = raw.postprocess(
            gamma=(1, 1),
            no_auto_bright=True,
            output_bps=16,
            use_camera_wb=True,
            user_flip=0,
        )
        white = int(raw.white_level)
    bits = max(8, int(math.ceil(math.log2(white + 1)))) if white > 0 else 16
    return rgb, 1, False, idx, bits


def _video_info(path: Path) -> tuple[int, bool]:
    """(number of frames, lossy) of the first video stream, counted from packets if needed.

    Cached per file (path, size, modification time): containers without a
    frame count (e.g. MKV) are counted by demuxing every packet, which a
    frame-by-frame reader would otherwise repeat for every frame.
    """
    st = os.stat(path)
    return _video_info_cached(str(Path(path).resolve()), st.st_size, st.st_mtime_ns)


@functools.lru_cache(maxsize=64)
def _video_info_cached(path: str, size: int, mtime_ns: int) -> tuple[int, bool]:  # noqa: ARG001 - cache keys
    import av

    with av.open(str(path)) as container:
        if not container.streams.video:
            raise ValueError("no video stream")
        stream = container.streams.video[0]
        lossy = stream.codec_context.name not in _LOSSLESS_CODECS
        n = int(stream.frames or 0)
        if n <= 0:
            n = sum(1 for pkt in container.demux(stream) if pkt.size)
    return n, lossy


def _read_video(path: Path, frame: int | None):
    import imageio.v3 as iio

    n, lossy = _video_info(path)
    idx = _frame_index(frame, n, path)
    arr = iio.imread(path, plugin="pyav", index=idx, format="rgb24")
    return arr, n, lossy, idx


# --------------------------------------------------------------------------- public API


def _finish(
    arr: np.ndarray,
    path: Path,
    *,
    idx: int,
    n: int,
    lossy: bool,
    channel: str,
    linearize: bool,
    exif: dict,
    bit_depth: int | None = None,
) -> ImageData:
    scaled, bits = _scale(arr)
    data = np.ascontiguousarray(_to_single(scaled, channel, linearize=linearize), dtype=np.float64)
    # integer pixels scaled to [0, 1] are always finite: only float files need the check
    bad = int(np.count_nonzero(~np.isfinite(data))) if arr.dtype.kind == "f" else 0
    if bad:
        raise InputError(f"image {path} frame {idx} has {bad} non-finite pixel(s) (NaN or inf)")
    return ImageData(
        data=data,
        bit_depth=int(bit_depth or bits),
        lossy=bool(lossy),
        source=(str(path), idx),
        exif=exif,
        n_frames=int(n),
    )


def read_image(
    path: str | os.PathLike,
    *,
    frame: int | None = None,
    channel: str = "luminance",
    linearize: bool = False,
) -> ImageData:
    """Read one frame of an image, RAW or video file as a 2-D float image.

    Parameters
    ----------
    path : path-like
        File to read; the format is chosen from the suffix (RAW and video
        suffixes, ``.tif``/``.tiff``), anything else is opened with Pillow.
    frame : int, optional
        Page of a multi-page TIFF or frame of a video (0-based); default 0.
    channel : {"luminance", "red", "green", "blue"}
        How colour is reduced to one channel (Rec. 709 weights for
        luminance).  Ignored for greyscale files.
    linearize : bool
        Apply the sRGB decoding curve before the channel reduction (not for
        RAW, which is linear already, nor for float TIFF).

    Returns
    -------
    ImageData

    Raises
    ------
    DataFileError
        Missing or unreadable file.
    InputError
        Bad ``channel``/``frame`` or non-finite pixels.

    Warns
    -----
    LossyInputWarning
        When the file is lossy-compressed (JPEG, lossy video ...).

    References
    ----------
    ITU-R Recommendation BT.709-6 (2015), luminance weights.
    IEC 61966-2-1:1999, sRGB transfer function.
    """
    image = _read_quietly(path, frame=frame, channel=channel, linearize=linearize)
    _warn_if_lossy(image)
    return image


def _warn_if_lossy(image: ImageData) -> None:
    if image.lossy:
        warnings.warn(
            f"{image.source[0]} is lossy-compressed; compression artefacts add displacement error "
            "(see docs/images.md for the measured JPEG error)",
            LossyInputWarning,
            stacklevel=3,
        )


def read_pair(
    reference: str | os.PathLike,
    measurement: str | os.PathLike,
    *,
    reference_frame: int | None = None,
    measurement_frame: int | None = None,
    channel: str = "luminance",
    linearize: bool = False,
) -> tuple[ImageData, ImageData]:
    """Read the reference and the measurement image at once, in two threads.

    Same result, errors and warnings as two calls of :func:`read_image`
    (reference first): the decoders (zlib, libpng/libtiff through Pillow and
    tifffile) and numpy's type conversion release the interpreter lock, so
    the two files are decoded side by side on a multi-core machine.

    Parameters
    ----------
    reference, measurement : path-like
        The two files (may be the same multi-frame file).
    reference_frame, measurement_frame : int, optional
        Frame/page of each file (0-based); default 0.
    channel, linearize
        As for :func:`read_image`, applied to both.

    Returns
    -------
    (ImageData, ImageData)
        Reference, measurement.

    Raises
    ------
    DataFileError, InputError
        As :func:`read_image`; an error of the reference is raised before one
        of the measurement.
    """
    from concurrent.futures import ThreadPoolExecutor

    options = {"channel": channel, "linearize": linearize}
    with ThreadPoolExecutor(max_workers=1, thread_name_prefix="bos-read") as pool:
        later = pool.submit(_read_quietly, measurement, frame=measurement_frame, **options)
        try:
            ref = _read_quietly(reference, frame=reference_frame, **options)
        except BaseException:
            later.cancel()
            raise
        meas = later.result()
    _warn_if_lossy(ref)
    _warn_if_lossy(meas)
    return ref, meas


def _read_quietly(path: str | os.PathLike, *, frame: int | None, channel: str, linearize: bool) -> ImageData:
    """:func:`read_image` without the lossy-input warning (the caller issues it)."""
    if channel not in ("luminance", *_CHANNELS):
        raise InputError(f"unknown channel {channel!r}; use 'luminance', 'red', 'green' or 'blue'")
    p = _check_exists(path)
    suffix = p.suffix.lower()
    bit_depth = None
    try:
        if suffix in RAW_SUFFIXES:
            arr, n, lossy, idx, bit_depth = _read_raw(p, frame)
            linearize = False
        elif suffix in VIDEO_SUFFIXES:
            arr, n, lossy, idx = _read_video(p, frame)
        elif suffix in _TIFF_SUFFIXES:
            arr, n, lossy, idx = _read_tiff(p, frame)
        else:
            arr, n, lossy, idx = _read_pillow(p, frame)
        if arr.dtype.kind == "f":
            linearize = False
    except (InputError, DataFileError):
        raise
    except Exception as exc:  # noqa: BLE001 - every decoder failure becomes one line
        raise _cannot_read(p, exc) from None
    lossy = lossy or suffix in _LOSSY_SUFFIXES
    exif = {} if suffix in VIDEO_SUFFIXES else _read_exif(p)
    try:
        return _finish(arr, p, idx=idx, n=n, lossy=lossy, channel=channel, linearize=linearize, exif=exif, bit_depth=bit_depth)
    except ValueError as exc:
        if isinstance(exc, InputError):
            raise
        raise _cannot_read(p, exc) from None


def iter_frames(
    path: str | os.PathLike, *, channel: str = "luminance", linearize: bool = False
) -> Iterator[ImageData]:
    """Yield every frame of a video (or page of a multi-page TIFF) in order.

    Decodes the video once, sequentially (no seeking).  Parameters and
    errors as :func:`read_image`; the lossy warning is given once.
    """
    if channel not in ("luminance", *_CHANNELS):
        raise InputError(f"unknown channel {channel!r}; use 'luminance', 'red', 'green' or 'blue'")
    p = _check_exists(path)
    if p.suffix.lower() not in VIDEO_SUFFIXES:
        first = read_image(p, channel=channel, linearize=linearize)
        yield first
        for i in range(1, first.n_frames):
            with warnings.catch_warnings():
                warnings.simplefilter("ignore", LossyInputWarning)
                yield read_image(p, frame=i, channel=channel, linearize=linearize)
        return
    import imageio.v3 as iio

    try:
        n, lossy = _video_info(p)
        frames = iio.imiter(p, plugin="pyav", format="rgb24")
    except Exception as exc:  # noqa: BLE001
        raise _cannot_read(p, exc) from None
    i = 0
    while True:
        try:
            arr = next(frames)
        except StopIteration:
            return
        except Exception as exc:  # noqa: BLE001
            raise _cannot_read(p, f"frame {i}: {_one_line(exc)}") from None
        image = _finish(arr, p, idx=i, n=n, lossy=lossy, channel=channel, linearize=linearize, exif={})
        if not i:
            _warn_if_lossy(image)
        yield image
        i += 1


def check_pair(ref: ImageData, meas: ImageData) -> None:
    """Check that a reference and a measurement image can be compared.

    Raises
    ------
    InputError
        Different sizes, or non-finite pixels in either image.

    Warns
    -----
    BitDepthMismatchWarning
        Different bit depths (e.g. 8-bit and 16-bit).  Both are already
        scaled to [0, 1], so the pair is usable, but the coarser file limits
        the precision.

    Notes
    -----
    Lossy inputs are not warned about again here: :func:`read_image` does
    that when it reads them (see ``ImageData.lossy``).
    """
    for name, im in (("reference", ref), ("measurement", meas)):
        if np.ndim(im.data) != 2:
            raise InputError(f"{name} image must be 2-D, got shape {np.shape(im.data)}")
        bad = int(np.count_nonzero(~np.isfinite(im.data)))
        if bad:
            raise InputError(f"{name} image {im.source[0]} has {bad} non-finite pixel(s) (NaN or inf)")
    if ref.data.shape != meas.data.shape:
        (r0, c0), (r1, c1) = ref.data.shape, meas.data.shape
        raise InputError(
            f"image size mismatch: reference {ref.source[0]} is {r0}x{c0} (rows x cols), "
            f"measurement {meas.source[0]} is {r1}x{c1}"
        )
    if ref.bit_depth != meas.bit_depth:
        warnings.warn(
            f"bit depth differs: reference {ref.bit_depth}-bit, measurement {meas.bit_depth}-bit; "
            "both were scaled to [0, 1], precision is limited by the coarser one",
            BitDepthMismatchWarning,
            stacklevel=2,
        )


def _check_shape(shape) -> tuple[int, int]:
    try:
        rows, cols = (int(v) for v in shape)
    except (TypeError, ValueError):
        raise InputError(f"shape must be (rows, cols), got {shape!r}") from None
    if rows <= 0 or cols <= 0:
        raise InputError(f"shape must be positive, got {shape!r}")
    return rows, cols


def read_mask(path: str | os.PathLike, *, shape: tuple[int, int]) -> np.ndarray:
    """Read a mask image: nonzero pixels are masked ("no data here").

    Any colour channel being nonzero masks the pixel; an alpha channel is
    ignored.  Returns a boolean (rows, cols) array.

    Raises
    ------
    InputError
        The mask size differs from ``shape`` (both sizes are named).
    DataFileError
        Missing or unreadable file.
    """
    rows, cols = _check_shape(shape)
    p = _check_exists(path)
    suffix = p.suffix.lower()
    try:
        if suffix in _TIFF_SUFFIXES:
            arr = _read_tiff(p, None)[0]
        elif suffix in RAW_SUFFIXES or suffix in VIDEO_SUFFIXES:
            raise ValueError("masks must be still images (PNG, TIFF, BMP ...)")
        else:
            arr = _read_pillow(p, None)[0]
    except InputError:
        raise
    except Exception as exc:  # noqa: BLE001
        raise _cannot_read(p, exc) from None
    arr = np.asarray(arr)
    if arr.ndim == 3:
        nc = arr.shape[2]
        if nc in (2, 4):
            arr = arr[..., : nc - 1]
        arr = arr.max(axis=2)
    if arr.ndim != 2:
        raise InputError(f"mask {p} is not a 2-D picture (array shape {arr.shape})")
    if arr.dtype.kind == "f" and not np.all(np.isfinite(arr)):
        raise InputError(f"mask {p} has non-finite pixel values")
    levels = np.unique(arr)
    if levels.size > 2:
        # grey (anti-aliased or photographed) mask: pixels at >= 50 % of the brightest level are masked
        cut = 0.5 * float(levels[-1])
        mask = arr >= cut
        warnings.warn(f"mask {p} is not black-and-white ({levels.size} grey levels): pixels at >= 50 % of "
                      f"the brightest level are masked ({100 * mask.mean():.1f} % of the picture)", stacklevel=2)
    else:
        mask = arr != 0
    if mask.shape != (rows, cols):
        raise InputError(
            f"mask {p} is {mask.shape[0]}x{mask.shape[1]} (rows x cols) but the images are {rows}x{cols}"
        )
    return mask


def polygon_mask(polygons: Sequence[Sequence[Sequence[float]]], *, shape: tuple[int, int]) -> np.ndarray:
    """Boolean mask that is True inside any of the polygons.

    Parameters
    ----------
    polygons : list of polygons
        Each polygon is a list of at least three (x, y) = (col, row) vertices
        in pixels (pixel centres at integer positions).
    shape : (rows, cols)

    Notes
    -----
    Rasterised with :func:`skimage.draw.polygon` (pixel centres inside the
    polygon); parts outside the image are clipped.
    """
    from skimage.draw import polygon as draw_polygon

    rows, cols = _check_shape(shape)
    mask = np.zeros((rows, cols), dtype=bool)
    if polygons is None:
        return mask
    for i, poly in enumerate(polygons):
        try:
            verts = np.asarray(poly, dtype=np.float64)
        except (TypeError, ValueError):
            raise InputError(f"polygon {i} must be a list of (x, y) pairs, got {poly!r}") from None
        if verts.ndim != 2 or verts.shape[1] != 2 or verts.shape[0] < 3:
            raise InputError(f"polygon {i} needs at least 3 (x, y) vertices, got shape {verts.shape}")
        if not np.all(np.isfinite(verts)):
            raise InputError(f"polygon {i} has non-finite vertex coordinates")
        rr, cc = draw_polygon(verts[:, 1], verts[:, 0], shape=(rows, cols))
        mask[rr, cc] = True
    return mask


def combine_masks(*masks: np.ndarray | None) -> np.ndarray | None:
    """Union of boolean masks (None entries are skipped; all None -> None).

    Raises
    ------
    InputError
        Masks of different shapes.
    """
    present = [np.asarray(m, dtype=bool) for m in masks if m is not None]
    if not present:
        return None
    shape = present[0].shape
    for m in present[1:]:
        if m.shape != shape:
            raise InputError(f"cannot combine masks of shapes {shape} and {m.shape}")
    return np.logical_or.reduce(present)
