"""Frame sources for sequences: globs, folders, list files, videos, multi-page TIFF.

:func:`resolve_frames` turns what a user types after ``--frames`` into an
ordered list of :class:`FrameRef` (one per frame, the file and the frame
inside it), with the time of each frame when it is known.
:func:`average_frames` builds a reference image averaged over several
no-flow frames.

Order: files are sorted by name with runs of digits compared as numbers
(``f9.png`` before ``f10.png``; for zero-padded names this is the plain
name order); the frames of a video or a multi-page TIFF are taken in
stored order.
"""

from __future__ import annotations

import datetime
import glob
import os
import re
from dataclasses import dataclass
from pathlib import Path
from typing import Sequence

import numpy as np

from .errors import DataFileError, InputError

__all__ = ["FrameRef", "FrameSet", "LIST_SUFFIXES", "IMAGE_SUFFIXES", "parse_range", "resolve_frames",
           "average_frames", "natural_key"]

#: Suffixes of text files that list one image per line.
LIST_SUFFIXES = frozenset({".txt", ".lst", ".list"})
#: Still-image suffixes taken from a folder (other files there are ignored).
IMAGE_SUFFIXES = frozenset(".png .tif .tiff .jpg .jpeg .jpe .bmp .webp .pgm .ppm .pnm .gif".split())


@dataclass(frozen=True)
class FrameRef:
    """One input frame.

    Attributes
    ----------
    path : str
        Absolute path of the file holding the frame.
    frame : int or None
        Frame index inside a video or multi-page TIFF (0-based); None for a still image.
    """

    path: str
    frame: int | None = None

    @property
    def name(self) -> str:
        """File name, with ``#k`` appended for a frame inside a multi-frame file."""
        base = os.path.basename(self.path)
        return base if self.frame is None else f"{base}#{self.frame}"


@dataclass
class FrameSet:
    """Ordered frames and their times.

    Attributes
    ----------
    frames : list of FrameRef
    time_s : ndarray
        Time of each frame from the first selected one [s]; NaN where unknown.
    time_source : str
        Where the times come from ("video timestamps", "frame rate 240 Hz",
        "EXIF DateTimeOriginal", or "unknown").
    kind : str
        "files", "video" or "multipage".
    """

    frames: list[FrameRef]
    time_s: np.ndarray
    time_source: str
    kind: str


def natural_key(name: str) -> list:
    """Sort key comparing runs of digits as numbers (``f9`` < ``f10``)."""
    return [int(t) if t.isdigit() else t for t in re.split(r"(\d+)", name)]


def parse_range(text: str | None) -> slice | None:
    """``START:STOP[:STEP]`` (Python slice rules, any part may be empty) -> slice.

    A single number ``K`` selects frame K alone.

    Raises
    ------
    InputError
        Not of that form, or a zero step.
    """
    if text is None or not str(text).strip():
        return None
    parts = str(text).strip().split(":")
    try:
        values = [int(p) if p.strip() else None for p in parts]
    except ValueError:
        raise InputError(f"--range must be START:STOP[:STEP] with whole numbers, got {text!r}") from None
    if len(values) == 1:
        if values[0] is None:
            return None
        k = values[0]
        return slice(k, k + 1 if k != -1 else None)
    if len(values) > 3:
        raise InputError(f"--range must be START:STOP[:STEP], got {text!r}")
    if len(values) == 3 and values[2] is not None and values[2] <= 0:
        raise InputError(f"--range step must be a positive whole number, got {text!r}")
    return slice(*values)


def _files_in_folder(folder: Path) -> list[Path]:
    return [p for p in folder.iterdir() if p.is_file() and p.suffix.lower() in IMAGE_SUFFIXES
            and not p.name.startswith(".")]


def _list_file(path: Path) -> list[Path]:
    try:
        text = path.read_text(encoding="utf-8")
    except (OSError, UnicodeDecodeError) as exc:
        raise DataFileError(f"cannot read frame list {path}: {exc}") from None
    out = []
    for line in text.splitlines():
        line = line.strip()
        if not line or line.startswith("#"):
            continue
        p = Path(line).expanduser()
        out.append(p if p.is_absolute() else path.parent / p)
    return out  # listed order is kept: the user chose it


def _frame_count(path: Path) -> int:
    from .images import read_image

    return int(read_image(path, frame=0).n_frames)


def _video_times(path: Path, n: int) -> tuple[np.ndarray, str]:
    """Presentation times [s] of the first ``n`` frames (packet timestamps), or from the rate."""
    import av

    try:
        with av.open(str(path)) as container:
            stream = container.streams.video[0]
            pts = sorted(p.pts for p in container.demux(stream) if p.size and p.pts is not None)
            tb = stream.time_base
            rate = stream.average_rate
    except Exception:  # noqa: BLE001 - timing is optional
        return np.full(n, np.nan), "unknown"
    if len(pts) >= n and tb:
        t = np.array([float((p - pts[0]) * tb) for p in pts[:n]])
        return t, "video timestamps"
    if rate:
        return np.arange(n) / float(rate), f"video frame rate {float(rate):g} Hz"
    return np.full(n, np.nan), "unknown"


def _exif_time(path: str) -> float | None:
    """EXIF DateTimeOriginal (+ SubSecTimeOriginal) as seconds since the epoch (naive clock)."""
    from PIL import Image

    try:
        with Image.open(path) as im:
            exif = im.getexif().get_ifd(0x8769)
    except Exception:  # noqa: BLE001
        return None
    stamp = exif.get(36867)  # DateTimeOriginal, EXIF 2.3 "YYYY:MM:DD HH:MM:SS"
    if not isinstance(stamp, str):
        return None
    try:
        t = datetime.datetime.strptime(stamp.strip("\x00 "), "%Y:%m:%d %H:%M:%S")
    except ValueError:
        return None
    sub = str(exif.get(37521, "") or "").strip("\x00 ")  # SubSecTimeOriginal: decimal digits
    frac = float(f"0.{sub}") if sub.isdigit() else 0.0
    return t.replace(tzinfo=datetime.timezone.utc).timestamp() + frac


def resolve_frames(pattern: str | os.PathLike, *, frame_range: slice | None = None,
                   frame_rate_hz: float | None = None) -> FrameSet:
    """The frames selected by ``pattern``, in order.

    Parameters
    ----------
    pattern : str or path-like
        A glob (``"run1/img_*.png"``, relative to the current directory), a
        folder (its still images), a text file (``.txt``, ``.lst``, ``.list``)
        listing one image per line (relative lines are taken relative to the
        list file; ``#`` starts a comment), a video file (every frame), a
        multi-page TIFF (every page) or a single image.
    frame_range : slice, optional
        Applied to the ordered frames (see :func:`parse_range`).
    frame_rate_hz : float, optional
        Capture frame rate [Hz]; times become ``position / rate`` (overrides
        timestamps: phone slow-motion files often store the playback rate).

    Returns
    -------
    FrameSet

    Raises
    ------
    InputError
        Nothing matched, or the range selects nothing.
    DataFileError
        A listed file or the video is missing or unreadable.
    """
    from .images import VIDEO_SUFFIXES

    if frame_rate_hz is not None and not (np.isfinite(frame_rate_hz) and frame_rate_hz > 0):
        raise InputError(f"frame rate must be a positive number of Hz, got {frame_rate_hz!r}")
    text = os.fspath(pattern)
    p = Path(text).expanduser()
    times: np.ndarray | None = None
    time_source = "unknown"
    kind = "files"
    if p.is_dir():
        files = sorted(_files_in_folder(p), key=lambda q: natural_key(q.name))
        refs = [FrameRef(str(f.resolve())) for f in files]
    elif p.is_file() and p.suffix.lower() in LIST_SUFFIXES:
        refs = [FrameRef(str(f.resolve())) for f in _list_file(p)]
        missing = [r.path for r in refs if not os.path.isfile(r.path)]
        if missing:
            raise DataFileError(f"frame list {p}: file not found: {missing[0]}"
                                + (f" (and {len(missing) - 1} more)" if len(missing) > 1 else ""))
    elif p.is_file() and (p.suffix.lower() in VIDEO_SUFFIXES or p.suffix.lower() in (".tif", ".tiff")):
        n = _frame_count(p)
        refs = [FrameRef(str(p.resolve()), k) for k in range(n)]
        if p.suffix.lower() in VIDEO_SUFFIXES:
            kind = "video"
            times, time_source = _video_times(p, n)
        elif n > 1:
            kind = "multipage"
        else:
            refs = [FrameRef(str(p.resolve()))]
    elif p.is_file():
        refs = [FrameRef(str(p.resolve()))]
    else:
        matches = [Path(m) for m in glob.glob(os.path.expanduser(text), recursive=True)]
        files = sorted((m for m in matches if m.is_file()), key=lambda q: natural_key(str(q)))
        refs = [FrameRef(str(f.resolve())) for f in files]
    if not refs:
        raise InputError(f"no frames matched {text!r} (give a quoted glob, a folder, a list file or a video)")
    index = np.arange(len(refs))
    if frame_range is not None:
        index = index[frame_range]
        if index.size == 0:
            raise InputError(f"the range selects none of the {len(refs)} frame(s) matched by {text!r}")
    refs = [refs[i] for i in index]
    if frame_rate_hz is not None:
        t = (index - index[0]).astype(float) / frame_rate_hz
        return FrameSet(refs, t, f"frame rate {frame_rate_hz:g} Hz", kind)
    if times is not None:
        t = times[index]
        return FrameSet(refs, t - t[0], time_source, kind)
    if kind == "files":
        stamps = [_exif_time(r.path) for r in refs]
        if all(s is not None for s in stamps):
            t = np.array(stamps, float)
            return FrameSet(refs, t - t[0], "EXIF DateTimeOriginal", kind)
    return FrameSet(refs, np.full(len(refs), np.nan), "unknown", kind)


def read_frame(ref: FrameRef):
    """Read one frame (:func:`bos.images.read_image`) -> ImageData."""
    from .images import read_image

    return read_image(ref.path, frame=ref.frame)


def average_frames(frames: Sequence[FrameRef]) -> tuple[np.ndarray, list[str]]:
    """Mean of several frames (float64, summed in the given order).

    Averaging N no-flow frames lowers the uncorrelated camera noise of the
    reference by sqrt(N).

    Returns
    -------
    (image, warnings)

    Raises
    ------
    InputError
        No frames, or frames of different sizes.
    """
    import warnings as warnings_module

    if not frames:
        raise InputError("no reference frames to average")
    total = None
    with warnings_module.catch_warnings(record=True) as caught:
        warnings_module.simplefilter("always")
        for ref in frames:
            data = read_frame(ref).data
            if total is None:
                total = np.zeros_like(data, dtype=np.float64)
            elif data.shape != total.shape:
                raise InputError(f"reference frame {ref.name} is {data.shape[1]}x{data.shape[0]} px, "
                                 f"the first is {total.shape[1]}x{total.shape[0]} px")
            total += data
    msgs = list(dict.fromkeys(" ".join(str(w.message).split()) for w in caught))
    return total / len(frames), msgs
