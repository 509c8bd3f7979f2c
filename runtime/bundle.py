"""Reading and writing bundle directories safely.

Reading refuses any level path that could leave the bundle (absolute, `..`, backslashes, NUL,
symlinks, hard links) and checks SHA-256 before a byte is parsed. Writing goes to a temporary
directory beside the target and is renamed into place, so no half bundle is ever visible.
"""

from __future__ import annotations

import json
import os
import stat
from collections.abc import Mapping
from dataclasses import replace
from pathlib import Path, PurePosixPath
from typing import TYPE_CHECKING

from .errors import BundleError
from .limits import DEFAULT_LIMITS, Limits
from .manifest import LevelEntry, Manifest, level_file_name, parse_manifest_text
from .samples import decode_samples

if TYPE_CHECKING:
    import numpy as np

# The interpreter's own SHA-256 (no OpenSSL): hashlib would map OpenSSL's libcrypto, about
# 3.7 MiB of resident memory, for this one digest (peak memory is a benchmark target).
try:
    from _sha2 import sha256 as _sha256  # Python 3.12+
except ImportError:
    try:
        from _sha256 import sha256 as _sha256  # Python 3.10, 3.11
    except ImportError:
        from hashlib import sha256 as _sha256

MANIFEST_NAME = "manifest.json"
REPORT_NAME = "report.json"


def model_name(folder: str | os.PathLike[str]) -> str:
    """The name a bundle is served under: its folder name less a `.bundle` suffix."""
    name = Path(folder).name
    stem = name[: -len(".bundle")] if name.endswith(".bundle") else name
    return stem or name


def sha256_hex(data: bytes) -> str:
    return _sha256(data).hexdigest()


def check_relative_path(relative: str, where: str) -> tuple[str, ...]:
    """Split a manifest file path into safe components or raise `BundleError`."""
    if not relative or "\x00" in relative or "\\" in relative:
        raise BundleError(
            f"`{where}` is {relative!r}; expected a relative POSIX path without NUL or backslash."
        )
    path = PurePosixPath(relative)
    if path.is_absolute() or relative.startswith("/") or (len(relative) > 1 and relative[1] == ":"):
        raise BundleError(f"`{where}` is {relative!r}; absolute paths are refused.")
    parts = tuple(part for part in relative.split("/") if part not in ("", "."))
    if not parts or any(part == ".." for part in parts):
        raise BundleError(
            f"`{where}` is {relative!r}; paths must stay inside the bundle (no '..')."
        )
    return parts


def read_bundle_file(root: Path, relative: str, where: str, *, max_bytes: int) -> bytes:
    """Read a regular file inside `root` without following any symlink on the way."""
    parts = check_relative_path(relative, where)
    current = root
    for index, part in enumerate(parts):
        current = current / part
        try:
            info = os.lstat(current)
        except FileNotFoundError as error:
            raise BundleError(f"`{where}` names {relative!r}, which is missing.") from error
        except OSError as error:
            raise BundleError(f"`{where}` names {relative!r}, which cannot be read: {error}.") \
                from error
        if stat.S_ISLNK(info.st_mode):
            raise BundleError(f"`{where}` names {relative!r}, which passes through a symlink.")
        last = index == len(parts) - 1
        if not last and not stat.S_ISDIR(info.st_mode):
            raise BundleError(f"`{where}` names {relative!r}; {part!r} is not a directory.")
    if not stat.S_ISREG(info.st_mode):
        raise BundleError(f"`{where}` names {relative!r}, which is not a regular file.")
    if info.st_nlink > 1:
        raise BundleError(f"`{where}` names {relative!r}, which is a hard link; refused.")
    if info.st_size > max_bytes:
        raise BundleError(
            f"`{where}` names {relative!r} of {info.st_size} bytes; the limit is {max_bytes} "
            "bytes."
        )
    flags = os.O_RDONLY | getattr(os, "O_NOFOLLOW", 0)
    try:
        descriptor = os.open(current, flags)
    except OSError as error:
        raise BundleError(f"`{where}` names {relative!r}, which cannot be opened: {error}.") \
            from error
    with os.fdopen(descriptor, "rb") as handle:
        # Ask for the size lstat gave plus one byte, not for the limit: `read(n)` allocates
        # n bytes up front (256 MiB by default, for every level file).
        data = handle.read(info.st_size + 1)
    if len(data) > info.st_size:
        raise BundleError(f"`{where}` names {relative!r}, which grew while being read.")
    return data


def open_bundle_root(path: str | os.PathLike[str]) -> Path:
    root = Path(path)
    if not root.exists():
        raise BundleError(f"the bundle {str(root)!r} does not exist.")
    if not root.is_dir():
        raise BundleError(f"the bundle {str(root)!r} is not a directory (expected a folder "
                          f"holding {MANIFEST_NAME} and levels/).")
    return root.resolve()


def read_manifest(root: Path, *, limits: Limits = DEFAULT_LIMITS) -> Manifest:
    data = read_bundle_file(root, MANIFEST_NAME, MANIFEST_NAME,
                            max_bytes=limits.max_manifest_bytes)
    return parse_manifest_text(data, max_bytes=limits.max_manifest_bytes)


def check_checksum(data: bytes, expected: str, file: str, what: str) -> None:
    """Raise `BundleError` unless `data` hashes to `expected` (one wording for every file)."""
    digest = sha256_hex(data)
    if digest != expected:
        raise BundleError(
            f"the checksum of {file!r} ({what}) is {digest}; the manifest records {expected}: "
            "the file was changed or corrupted."
        )


def read_levels(root: Path, manifest: Manifest, *, verify: bool = True,
                limits: Limits = DEFAULT_LIMITS) -> dict[int, bytes]:
    """Read every level file, checking all paths first and then every checksum."""
    for index, entry in enumerate(manifest.levels):
        check_relative_path(entry.file, f"levels[{index}].file")
    contents = {}
    for index, entry in enumerate(manifest.levels):
        data = read_bundle_file(root, entry.file, f"levels[{index}].file",
                                max_bytes=limits.max_model_bytes)
        if verify:
            check_checksum(data, entry.sha256, entry.file, f"stride {entry.stride}")
        contents[entry.stride] = data
    return contents


def read_envelope_samples(root: Path, manifest: Manifest, *, verify: bool = True,
                          limits: Limits = DEFAULT_LIMITS) -> np.ndarray | None:
    """Read the envelope samples file, if the manifest names one, with the level files' checks.

    Returns
    -------
    ndarray, shape (count, d), read-only, or None
        Normalised training states, in the file's dtype (float32 or float64).
    """
    entry = manifest.envelope_samples
    if entry is None:
        return None
    where = "envelope.samples.file"
    data = read_bundle_file(root, entry.file, where, max_bytes=limits.max_model_bytes)
    if verify:
        check_checksum(data, entry.sha256, entry.file, "envelope samples")
    return decode_samples(data, count=entry.count, dim=manifest.level_dim, where=where)


def read_reduction(root: Path, manifest: Manifest, *, verify: bool = True,
                   limits: Limits = DEFAULT_LIMITS) -> tuple[bytes, bytes] | None:
    """Read the encoder and decoder files of a reduced bundle with the level files' checks.

    Returns
    -------
    (encoder bytes, decoder bytes), or None for a bundle without `reduction`
    """
    reduction = manifest.reduction
    if reduction is None:
        return None
    parts = (("encoder", reduction.encoder), ("decoder", reduction.decoder))
    for part, entry in parts:
        check_relative_path(entry.file, f"reduction.{part}.file")
    contents = []
    for part, entry in parts:
        data = read_bundle_file(root, entry.file, f"reduction.{part}.file",
                                max_bytes=limits.max_model_bytes)
        if verify:
            check_checksum(data, entry.sha256, entry.file, f"the {part}")
        contents.append(data)
    return contents[0], contents[1]


def write_bundle(out: str | os.PathLike[str], manifest: Manifest, level_files: Mapping[int, bytes],
                 *, overwrite: bool = False,
                 extra_files: Mapping[str, bytes] | None = None) -> Path:
    """Write a bundle atomically and return its path.

    Parameters
    ----------
    out : path
        The bundle directory to create.
    manifest : Manifest
        Its `levels` give strides and input/output names; files and checksums are filled in.
        The checksum of `envelope_samples`, if set, is filled in from `extra_files`.
    level_files : mapping of stride to bytes
        Serialized ONNX model of each level.
    overwrite : bool
        Replace an existing bundle at `out`; otherwise an existing path is an error.
    extra_files : mapping of relative path to bytes, optional
        Further files the manifest refers to: the envelope samples
        (``{manifest.envelope_samples.file: encode_samples(z)}``) and, for a reduced bundle,
        the encoder and decoder ONNX files (``{manifest.reduction.encoder.file: bytes, ...}``;
        their checksums are filled in). Each must be referred to
        by the manifest (nothing unchecked goes into a bundle); its content is checked the way
        `load` will check it.
    """
    target = Path(out)
    check_target(target, overwrite=overwrite)
    if sorted(level_files) != sorted(entry.stride for entry in manifest.levels):
        raise BundleError(
            f"level files were given for strides {sorted(level_files)} but the manifest lists "
            f"{sorted(entry.stride for entry in manifest.levels)}."
        )
    entries = tuple(
        LevelEntry(stride=entry.stride, file=level_file_name(entry.stride),
                   sha256=sha256_hex(level_files[entry.stride]),
                   input=entry.input, output=entry.output)
        for entry in manifest.levels
    )
    final_manifest = replace(manifest, levels=entries)
    extras = _staged_extras(final_manifest, extra_files or {})
    if final_manifest.envelope_samples is not None:
        samples = final_manifest.envelope_samples
        final_manifest = replace(final_manifest, envelope_samples=replace(
            samples, sha256=sha256_hex(extras[samples.file])))
    reduction = final_manifest.reduction
    if reduction is not None:
        final_manifest = replace(final_manifest, reduction=replace(
            reduction,
            encoder=replace(reduction.encoder, sha256=sha256_hex(extras[reduction.encoder.file])),
            decoder=replace(reduction.decoder, sha256=sha256_hex(extras[reduction.decoder.file]))))
    text = json.dumps(final_manifest.to_dict(), indent=2, allow_nan=False)
    parse_manifest_text(text)  # never write a manifest this reader would refuse

    # Imported here: only writers need them, and they cost readers import time and memory.
    import shutil
    import tempfile

    target.parent.mkdir(parents=True, exist_ok=True)
    staging = Path(tempfile.mkdtemp(prefix=f".{target.name}.tmp-", dir=target.parent))
    try:
        # mkdtemp makes the folder private (0700); a bundle is meant to be read by services
        # running as other users, like any installed data.
        os.chmod(staging, 0o755)
        (staging / "levels").mkdir()
        for entry in entries:
            (staging / entry.file).write_bytes(level_files[entry.stride])
        for relative, data in extras.items():
            path = staging.joinpath(*check_relative_path(relative, "extra_files"))
            path.parent.mkdir(parents=True, exist_ok=True)
            path.write_bytes(data)
        (staging / MANIFEST_NAME).write_text(text + "\n", encoding="utf-8")
        move_into_place(staging, target)
    except BaseException:
        shutil.rmtree(staging, ignore_errors=True)
        raise
    return target


def _staged_extras(manifest: Manifest, extra_files: Mapping[str, bytes]) -> dict[str, bytes]:
    """Check the extra files against the manifest; return them keyed by the manifest's path."""
    referenced = {}
    if manifest.envelope_samples is not None:
        referenced[manifest.envelope_samples.file] = "envelope.samples.file"
    if manifest.reduction is not None:
        referenced[manifest.reduction.encoder.file] = "reduction.encoder.file"
        referenced[manifest.reduction.decoder.file] = "reduction.decoder.file"
    taken = {MANIFEST_NAME, REPORT_NAME, *(entry.file for entry in manifest.levels)}
    extras = {}
    for relative, data in extra_files.items():
        parts = check_relative_path(relative, "extra_files")
        normal = "/".join(parts)
        if normal in taken or parts[0] == "levels":
            raise BundleError(
                f"`extra_files` names {relative!r}, which is the manifest, the report or under "
                "levels/; expected a file of its own."
            )
        if normal not in referenced:
            raise BundleError(
                f"`extra_files` names {relative!r}, which the manifest does not refer to; "
                f"referred files: {sorted(referenced)}."
            )
        if not isinstance(data, bytes | bytearray | memoryview):
            raise BundleError(
                f"`extra_files[{relative!r}]` is {type(data).__name__}; expected bytes."
            )
        extras[normal] = bytes(data)
    for relative, where in referenced.items():
        normal = "/".join(check_relative_path(relative, where))
        if normal not in extras:
            raise BundleError(
                f"the manifest's `{where}` is {relative!r} but `extra_files` does not hold it; "
                f"pass extra_files={{{relative!r}: <its bytes>}}."
            )
        if normal != relative:
            raise BundleError(
                f"`{where}` is {relative!r}; write it in its plain form {normal!r}."
            )
    samples = manifest.envelope_samples
    if samples is not None:
        decode_samples(extras[samples.file], count=samples.count, dim=manifest.level_dim,
                       where=f"extra_files[{samples.file!r}]")
    return extras


def check_target(target: str | os.PathLike[str], *, overwrite: bool, where: str = "",
                 hint: str = "pass overwrite=True (or --overwrite) to replace it") -> None:
    """Refuse to write a bundle where something already lies, unless `overwrite`.

    The one overwrite rule of every writer (`write_bundle`, `export_bundle`, `stridecast
    train`/`export`/`demo`); callers that work for minutes call it before starting, too.
    A folder is replaced only when `overwrite`; a file or a symbolic link never is.

    Parameters
    ----------
    target : path
        Where the bundle is to go.
    overwrite : bool
        Whether an existing bundle folder may be replaced.
    where : str
        The option that named `target` (e.g. "--out"), if any, for the message.
    hint : str
        How the caller lets its user replace it (the message's last clause).
    """
    target = Path(target)
    if not (target.exists() or target.is_symlink()):
        return
    if not overwrite:
        named = f"`{where}` " if where else ""
        raise BundleError(f"{named}{str(target)!r} already exists; {hint}.")
    if target.is_symlink() or not target.is_dir():
        raise BundleError(f"{str(target)!r} exists and is not a directory; refusing to replace it.")


def write_report(folder: str | os.PathLike[str], report: Mapping[str, object]) -> Path:
    """Write `report` as the bundle's report.json (strict JSON), replacing it atomically.

    The one writer of report.json: the exporter's staged bundle and the demo's additions
    both go through it. The file is written under a temporary name in `folder`, then renamed.

    Parameters
    ----------
    folder : path
        The bundle directory.
    report : mapping
        JSON-ready content; NaN and infinities are refused (JSON has no such numbers).
    """
    import tempfile

    path = Path(folder) / REPORT_NAME
    try:
        text = json.dumps(report, indent=2, allow_nan=False) + "\n"
    except (TypeError, ValueError) as error:
        raise BundleError(f"`report` cannot be written as JSON: {error}.") from error
    descriptor, temporary = tempfile.mkstemp(prefix=".report.", suffix=".json", dir=folder)
    try:
        with os.fdopen(descriptor, "w", encoding="utf-8") as handle:
            handle.write(text)
        os.chmod(temporary, 0o644)  # mkstemp makes the file private; bundles are shared data
        os.replace(temporary, path)
    except BaseException:
        if os.path.exists(temporary):
            os.unlink(temporary)
        raise
    return path


def move_into_place(staging: Path, target: Path) -> None:
    """Rename a finished bundle folder to `target`; an existing one is moved aside first and
    put back if the rename fails, then removed."""
    import shutil
    import tempfile

    if not target.exists():
        os.rename(staging, target)
        return
    # Replace: move the old bundle aside first so a failure can put it back.
    retired = Path(tempfile.mkdtemp(prefix=f".{target.name}.old-", dir=target.parent))
    os.rmdir(retired)
    os.rename(target, retired)
    try:
        os.rename(staging, target)
    except BaseException:
        os.rename(retired, target)
        raise
    shutil.rmtree(retired, ignore_errors=True)
