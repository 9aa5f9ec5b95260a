"""Small file helpers used at the I/O edges: atomic writes."""

from __future__ import annotations

import contextlib
import os
import tempfile
from pathlib import Path
from typing import Iterator

from .errors import DataFileError


@contextlib.contextmanager
def atomic_path(path: str | os.PathLike, *, suffix: str | None = None) -> Iterator[Path]:
    """Yield a temporary path next to ``path``; rename it onto ``path`` on success.

    If the body raises, the temporary file is removed and ``path`` is left
    untouched, so a crash never leaves a half-written file that looks
    complete.  The directory must exist and be writable.

    Parameters
    ----------
    path : path-like
        Final destination.
    suffix : str, optional
        Suffix of the temporary file (defaults to the suffix of ``path``, so
        libraries that pick a format from the extension still work).
    """
    final = Path(path)
    parent = final.parent if str(final.parent) else Path(".")
    if not parent.is_dir():
        raise DataFileError(f"output directory does not exist: {parent}")
    if not os.access(parent, os.W_OK):
        raise DataFileError(f"output directory is not writable: {parent}")
    sfx = final.suffix if suffix is None else suffix
    fd, tmp = tempfile.mkstemp(prefix=f".{final.stem}.", suffix=f"{sfx}.part{sfx}" if sfx else ".part", dir=parent)
    os.close(fd)
    tmp_path = Path(tmp)
    # mkstemp creates 0600 files; give results the usual permissions (0666 & ~umask).
    umask = os.umask(0)
    os.umask(umask)
    os.chmod(tmp_path, 0o666 & ~umask)
    try:
        yield tmp_path
        os.replace(tmp_path, final)
    except BaseException:
        with contextlib.suppress(OSError):
            tmp_path.unlink()
        raise


# ---------------------------------------------------------------------------
# Transactional output sets
# ---------------------------------------------------------------------------

MANIFEST_SUFFIX = "-run.json"
_STAGING_PREFIX = ".staging-"


def new_run_id() -> str:
    """A fresh identifier for one run's output set (UTC time + random part)."""
    import datetime
    import uuid

    stamp = datetime.datetime.now(datetime.timezone.utc).strftime("%Y%m%dT%H%M%SZ")
    return f"{stamp}-{uuid.uuid4().hex[:12]}"


def file_sha256(path: str | os.PathLike, *, chunk: int = 1 << 20) -> str:
    """SHA-256 hex digest of a file, read in chunks."""
    import hashlib

    h = hashlib.sha256()
    with open(path, "rb") as fh:
        for block in iter(lambda: fh.read(chunk), b""):
            h.update(block)
    return h.hexdigest()


class OutputSet:
    """All files of one run, written together or not at all.

    Files are written into a hidden staging folder beside their destination
    (same file system).  :meth:`commit` first writes a manifest (run id and
    SHA-256 of every file) into the staging folder, then moves each file
    into place, removes files of an earlier set of the same name that this
    run does not produce, and finally moves the manifest beside the files
    (``<name>-run.json``).  A crash (even SIGKILL) before the staged manifest
    exists leaves the old set untouched (the staging folder is removed by
    the next run); a crash after it is rolled forward by the next run, by
    :func:`recover_output_sets`, so the directory ends with either the old
    complete set or the new one.

    Parameters
    ----------
    directory : path-like
        Existing, writable output directory.
    name : str
        Base name of the set (``output.name``).
    run_id : str, optional
        Identifier recorded in the manifest (default: :func:`new_run_id`).
    """

    def __init__(self, directory: str | os.PathLike, name: str, *, run_id: str | None = None):
        self.directory = Path(directory)
        self.name = name
        self.run_id = run_id or new_run_id()
        recover_output_sets(self.directory, name)
        self.staging = self.directory / f".{name}{_STAGING_PREFIX}{self.run_id}"
        try:
            self.staging.mkdir()
        except OSError as exc:
            raise DataFileError(f"cannot write in the output directory {self.directory}: "
                                f"{exc.strerror or exc}") from None
        self._finals: list[Path] = []
        self.committed = False

    def path(self, final: str | os.PathLike) -> Path:
        """Where to write the file that will end at ``final`` (a path in the staging folder)."""
        final = Path(final)
        if final.parent.resolve() != self.directory.resolve():
            raise DataFileError(f"{final} is not inside the output directory {self.directory}")
        self._finals.append(final)
        return self.staging / final.name

    @property
    def manifest_path(self) -> Path:
        return self.directory / f"{self.name}{MANIFEST_SUFFIX}"

    def commit(self) -> list[Path]:
        """Swap the staged files in; return their final paths (in the order staged)."""
        import json

        finals = [f for f in dict.fromkeys(self._finals) if (self.staging / f.name).exists()]
        manifest = {"run_id": self.run_id, "name": self.name,
                    "files": {f.name: file_sha256(self.staging / f.name) for f in finals}}
        staged_manifest = self.staging / self.manifest_path.name
        with atomic_path(staged_manifest) as tmp:
            tmp.write_text(json.dumps(manifest, indent=1) + "\n")
        _roll_forward(self.staging, self.directory)
        self.committed = True
        return finals

    def abort(self) -> None:
        """Remove the staging folder (the earlier set stays as it was)."""
        import shutil

        shutil.rmtree(self.staging, ignore_errors=True)

    def __enter__(self) -> "OutputSet":
        return self

    def __exit__(self, exc_type, exc, tb) -> None:
        if exc_type is not None or not self.committed:
            self.abort()


def _roll_forward(staging: Path, directory: Path) -> None:
    """Complete the swap of a staging folder that holds its manifest (idempotent)."""
    import json
    import shutil

    manifest_files = [p for p in staging.iterdir() if p.name.endswith(MANIFEST_SUFFIX)]
    if not manifest_files:
        return
    staged_manifest = manifest_files[0]
    manifest = json.loads(staged_manifest.read_text())
    keep = set(manifest["files"])
    old_manifest = directory / staged_manifest.name
    if old_manifest.exists():  # files of the earlier set that this run does not produce
        with contextlib.suppress(OSError, ValueError, KeyError, TypeError):
            for old in json.loads(old_manifest.read_text()).get("files", {}):
                if old not in keep and Path(old).name == old:
                    with contextlib.suppress(FileNotFoundError):
                        (directory / old).unlink()
    for fname in manifest["files"]:
        src = staging / fname
        if src.exists():
            os.replace(src, directory / fname)
    os.replace(staged_manifest, old_manifest)
    shutil.rmtree(staging, ignore_errors=True)


def recover_output_sets(directory: str | os.PathLike, name: str) -> None:
    """Finish or discard staging folders of ``name`` left by an interrupted run.

    A staging folder with its manifest is rolled forward (the run had
    finished writing); one without is removed (the run had not).
    """
    import shutil

    d = Path(directory)
    if not d.is_dir():
        return
    for staging in sorted(d.glob(f".{name}{_STAGING_PREFIX}*")):
        if not staging.is_dir():
            continue
        if any(p.name.endswith(MANIFEST_SUFFIX) for p in staging.iterdir()):
            _roll_forward(staging, d)
        else:
            shutil.rmtree(staging, ignore_errors=True)


def _manifest_files(path: Path) -> tuple[dict, dict[str, str]] | None:
    """(manifest, file name -> SHA-256) of a ``*-run.json``, or None when it is unreadable."""
    import json

    try:
        manifest = json.loads(Path(path).read_text())
        return manifest, dict(manifest["files"])
    except (OSError, ValueError, KeyError, TypeError):
        return None


def check_output_set(result_path: str | os.PathLike, run_id: str | None) -> list[str]:
    """Warnings when the files beside a result are not all from its run.

    Reads ``<name>-run.json`` next to ``result_path``: the manifest must name
    the same run id, and every file it lists must exist with the recorded
    SHA-256.
    """
    p = Path(result_path)
    stem = p.stem
    manifest_path = p.with_name(f"{stem}{MANIFEST_SUFFIX}")
    if not manifest_path.exists():
        return [] if run_id is None else [f"no run manifest ({manifest_path.name}) beside the result: "
                                          "cannot check that the files beside it belong to the same run"]
    read = _manifest_files(manifest_path)
    if read is None:
        return [f"the run manifest {manifest_path.name} is unreadable"]
    manifest, files = read
    out = []
    if run_id is not None and manifest.get("run_id") != run_id:
        out.append(f"the files beside {p.name} belong to another run ({manifest.get('run_id')}, "
                   f"this result is run {run_id})")
    for fname, digest in files.items():
        f = p.with_name(fname)
        if not f.exists():
            out.append(f"{fname} of this run is missing")
        elif fname != p.name and file_sha256(f) != digest:
            out.append(f"{fname} is not the file written by run {manifest.get('run_id')} (changed or from another run)")
        elif fname == p.name and file_sha256(f) != digest:
            out.append(f"{fname} differs from the file recorded in {manifest_path.name}")
    return out


def output_set_members(directory: str | os.PathLike) -> dict[str, str]:
    """File name -> name of the output set whose manifest (``*-run.json``) in ``directory`` lists it.

    Lets a command that writes beside a finished run refuse to overwrite the
    run's own files (which would leave the set mixed: its manifest would no
    longer match).  Unreadable manifests are skipped.
    """
    out: dict[str, str] = {}
    d = Path(directory)
    if not d.is_dir():
        return out
    for m in sorted(d.glob(f"*{MANIFEST_SUFFIX}")):
        read = _manifest_files(m)
        for fname in (read[1] if read is not None else ()):
            out.setdefault(str(fname), m.name[:-len(MANIFEST_SUFFIX)])
    return out
