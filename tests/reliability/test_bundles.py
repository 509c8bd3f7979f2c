"""Hostile bundles: every one is refused with `BundleError` before a level is parsed, and no file
outside the bundle is opened.

Beside each bundle lies `outside.onnx`, a copy of the bundle's own stride-1 level: a valid model
whose SHA-256 is the one the manifest records, so any escape that reached it would load. It is
watched twice: every `open`/`os.open` during `load` is recorded, and its access time is set to
2001 first (a control read shows the file system updates it; the mount is `relatime`).
"""

from __future__ import annotations

import builtins
import errno
import io
import json
import os
import threading
from dataclasses import dataclass, field
from pathlib import Path

import pytest

from stridecast.runtime import DEFAULT_LIMITS, BundleError, Limits, load, sha256_hex
from stridecast.runtime import loader as loader_module
from tests.builders import edit_manifest, linear_bundle, oscillator_matrix

OLD_TIME = 978_307_200  # 2001-01-01, far older than any mtime in the test
AREA_PATHS = "Bundles: paths"
AREA_FILES = "Bundles: files"
AREA_MANIFEST = "Bundles: manifest"


@dataclass
class Watch:
    """What `load` did: files it opened and levels it parsed."""

    root: Path
    outside: Path
    opened: list[str] = field(default_factory=list)
    parsed: list[str] = field(default_factory=list)
    blocked: set[str] = field(default_factory=set)

    def escapes(self) -> list[str]:
        """Opened paths that resolve outside the bundle, or are the outside file's inode."""
        inode = os.stat(self.outside).st_ino
        bad = []
        for path in self.opened:
            real = Path(os.path.realpath(path))
            inside = real == self.root or self.root in real.parents
            same_inode = os.path.exists(path) and os.stat(path).st_ino == inode
            if not inside or same_inode:
                bad.append(path)
        return bad


def _atime_is_updated(tmp_path: Path) -> bool:
    """Control: does reading a file with an old atime update it on this file system?"""
    probe = tmp_path / "atime-probe"
    probe.write_bytes(b"probe")
    os.utime(probe, (OLD_TIME, os.stat(probe).st_mtime))
    probe.read_bytes()
    return os.stat(probe).st_atime > OLD_TIME


@pytest.fixture
def bundle(tmp_path: Path) -> Path:
    root = linear_bundle(tmp_path / "osc.bundle", oscillator_matrix(), base_step=0.1,
                         strides=(1, 4))
    (tmp_path / "outside.onnx").write_bytes((root / "levels/stride-00001.onnx").read_bytes())
    return root.resolve()


@pytest.fixture
def watched_load(bundle: Path, tmp_path: Path, monkeypatch: pytest.MonkeyPatch, reliability):
    """Call `load` on the bundle with opens and parses recorded; check the outside file."""
    outside = (tmp_path / "outside.onnx").resolve()
    atime_works = _atime_is_updated(tmp_path)

    def run(*, limits: Limits = DEFAULT_LIMITS,
            block: tuple[Path, ...] = ()) -> tuple[Watch, Exception | None]:
        watch = Watch(bundle, outside, blocked={str(path) for path in block})
        os.utime(outside, (OLD_TIME, os.stat(outside).st_mtime))
        real_open, real_io_open, real_os_open = builtins.open, io.open, os.open
        parse = loader_module.read_model
        owner = threading.get_ident()

        def record(path) -> None:
            if threading.get_ident() == owner and isinstance(path, str | bytes | os.PathLike):
                text = os.fsdecode(path)
                watch.opened.append(text)
                if text in watch.blocked:
                    # A FIFO would block the test forever if opened; fail the open instead.
                    raise OSError(errno.EINVAL, "blocked by the test", text)

        def open_(file, *args, **kwargs):
            record(file)
            return real_open(file, *args, **kwargs)

        def io_open(file, *args, **kwargs):
            record(file)
            return real_io_open(file, *args, **kwargs)

        def os_open(path, *args, **kwargs):
            record(path)
            return real_os_open(path, *args, **kwargs)

        def read_model(data, **kwargs):
            watch.parsed.append(kwargs.get("source", "?"))
            return parse(data, **kwargs)

        with monkeypatch.context() as patch:
            patch.setattr(builtins, "open", open_)
            patch.setattr(io, "open", io_open)
            patch.setattr(os, "open", os_open)
            patch.setattr(loader_module, "read_model", read_model)
            try:
                load(bundle, limits=limits)
            except Exception as error:  # judged by the caller
                caught = error
            else:
                caught = None
        assert watch.parsed == [], f"levels were parsed before the refusal: {watch.parsed}"
        assert watch.escapes() == [], f"opened outside the bundle: {watch.escapes()}"
        if atime_works:
            assert os.stat(outside).st_atime == OLD_TIME, "the outside file was read"
        return watch, caught

    run.atime_works = atime_works
    run.reliability = reliability
    return run


def refused(watched_load, area: str, tried: str, pattern: str, **kwargs) -> None:
    """Load, expect `BundleError` matching `pattern`, and record the case."""
    _, error = watched_load(**kwargs)
    assert isinstance(error, BundleError), f"expected BundleError, got {error!r}"
    with pytest.raises(BundleError, match=pattern):
        raise error
    watched = "watched file's atime unchanged" if watched_load.atime_works else \
        "(atime not tracked on this file system)"
    watched_load.reliability.record(
        area, tried, 1,
        f"all refused with BundleError; 0 levels parsed; 0 opens outside the bundle; {watched}",
    )


def set_level_file(bundle: Path, value: str, sha256: str | None = None) -> None:
    def change(document):
        document["levels"][0]["file"] = value
        if sha256 is not None:
            document["levels"][0]["sha256"] = sha256
    edit_manifest(bundle, change)


# --- paths in the manifest -----------------------------------------------------------------

ESCAPES = [
    ("parent", "../outside.onnx", r"paths must stay inside the bundle \(no '\.\.'\)"),
    ("parent-deep", "levels/../../outside.onnx", r"no '\.\.'"),
    ("parent-via-missing-dir", "a/../../outside.onnx", r"no '\.\.'"),
    ("parent-after-dot", "./levels/./../../outside.onnx", r"no '\.\.'"),
    ("double-dot-only", "..", r"no '\.\.'"),
    ("absolute", "{outside}", r"absolute paths are refused"),
    ("absolute-double-slash", "/{outside}", r"absolute paths are refused"),
    ("drive-letter", "C:/outside.onnx", r"absolute paths are refused"),
    ("backslash", "..\\outside.onnx", r"without NUL or backslash"),
    ("backslash-levels", "levels\\..\\..\\outside.onnx", r"without NUL or backslash"),
    ("nul", "levels/stride-00001.onnx\x00../../outside.onnx", r"without NUL or backslash"),
    ("empty", "", r"without NUL or backslash"),
    ("dot", ".", r"no '\.\.'"),
    ("directory", "levels", r"not a regular file"),
    ("tilde", "~/outside.onnx", r"which is missing"),
]


@pytest.mark.parametrize(("value", "pattern"), [case[1:] for case in ESCAPES],
                         ids=[case[0] for case in ESCAPES])
def test_path_escape_in_manifest_is_refused(bundle, tmp_path, watched_load, value, pattern):
    outside = tmp_path / "outside.onnx"
    # The outside file's checksum is the manifest's own: only the path check can stop it.
    set_level_file(bundle, value.format(outside=outside), sha256_hex(outside.read_bytes()))
    refused(watched_load, AREA_PATHS,
            "level paths that escape: `..`, `a/../../x`, absolute, `C:/`, backslashes, NUL, "
            "empty, `.`, a directory, `~`", rf"`levels\[0\]\.file` .*{pattern}")


# --- files that are not what they claim ----------------------------------------------------

def test_level_symlink_to_outside_is_refused(bundle, tmp_path, watched_load):
    level = bundle / "levels/stride-00001.onnx"
    level.unlink()
    level.symlink_to(tmp_path / "outside.onnx")
    refused(watched_load, AREA_FILES, "level file is a symlink (absolute, relative, via a "
            "symlinked `levels/`, manifest itself a symlink)", r"passes through a symlink")


def test_relative_level_symlink_is_refused(bundle, watched_load):
    level = bundle / "levels/stride-00001.onnx"
    level.unlink()
    level.symlink_to("../../outside.onnx")
    refused(watched_load, AREA_FILES, "level file is a symlink (absolute, relative, via a "
            "symlinked `levels/`, manifest itself a symlink)", r"passes through a symlink")


def test_symlinked_levels_directory_is_refused(bundle, tmp_path, watched_load):
    elsewhere = tmp_path / "elsewhere"
    (bundle / "levels").rename(elsewhere)
    (bundle / "levels").symlink_to(elsewhere)
    refused(watched_load, AREA_FILES, "level file is a symlink (absolute, relative, via a "
            "symlinked `levels/`, manifest itself a symlink)", r"passes through a symlink")


def test_symlinked_manifest_is_refused(bundle, tmp_path, watched_load):
    copy = tmp_path / "manifest-elsewhere.json"
    copy.write_bytes((bundle / "manifest.json").read_bytes())
    (bundle / "manifest.json").unlink()
    (bundle / "manifest.json").symlink_to(copy)
    refused(watched_load, AREA_FILES, "level file is a symlink (absolute, relative, via a "
            "symlinked `levels/`, manifest itself a symlink)", r"passes through a symlink")


def test_hard_link_to_outside_is_refused(bundle, tmp_path, watched_load):
    level = bundle / "levels/stride-00001.onnx"
    level.unlink()
    os.link(tmp_path / "outside.onnx", level)
    refused(watched_load, AREA_FILES, "level file is a hard link to a file outside",
            r"stride-00001\.onnx', which is a hard link; refused")


def test_fifo_level_is_refused_without_opening_it(bundle, watched_load):
    level = bundle / "levels/stride-00004.onnx"
    level.unlink()
    os.mkfifo(level)
    refused(watched_load, AREA_FILES, "level file is a FIFO (opening it would block)",
            r"stride-00004\.onnx', which is not a regular file", block=(level,))


def test_missing_level_is_refused(bundle, watched_load):
    (bundle / "levels/stride-00004.onnx").unlink()
    refused(watched_load, AREA_FILES, "manifest lists a file that is missing",
            r"names 'levels/stride-00004\.onnx', which is missing")


@pytest.mark.parametrize("position", [0, 100, -1])
def test_checksum_mismatch_is_refused_before_any_level_is_parsed(bundle, watched_load, position):
    # The damaged level is the second; the first is intact, and still nothing is parsed.
    level = bundle / "levels/stride-00004.onnx"
    data = bytearray(level.read_bytes())
    data[position] ^= 0x01
    level.write_bytes(bytes(data))
    refused(watched_load, AREA_FILES, "one bit flipped in a level file (first, middle, last "
            "byte)", r"the checksum of 'levels/stride-00004\.onnx' \(stride 4\) is [0-9a-f]{64}; "
            r"the manifest records [0-9a-f]{64}: the file was changed or corrupted\.")


def test_level_over_the_size_limit_is_refused_before_reading(bundle, watched_load):
    size = (bundle / "levels/stride-00001.onnx").stat().st_size
    refused(watched_load, AREA_FILES, "level file larger than `max_model_bytes`",
            rf"of {size} bytes; the limit is {size - 1} bytes",
            limits=Limits(max_model_bytes=size - 1))


# --- the manifest itself -------------------------------------------------------------------

def write_manifest(bundle: Path, text: str | bytes) -> None:
    data = text.encode() if isinstance(text, str) else text
    (bundle / "manifest.json").write_bytes(data)


def manifest_document(bundle: Path) -> dict:
    return json.loads((bundle / "manifest.json").read_text())


def test_manifest_over_the_size_limit_is_refused_before_reading(bundle, watched_load):
    document = manifest_document(bundle)
    document["x-padding"] = " " * (1024 * 1024)
    write_manifest(bundle, json.dumps(document))
    size = (bundle / "manifest.json").stat().st_size
    refused(watched_load, AREA_MANIFEST, "manifest of 1 MiB + padding (over the 1 MiB limit)",
            rf"'manifest\.json' of {size} bytes; the limit is 1048576 bytes")


@pytest.mark.parametrize("where", ["extension", "top"])
def test_json_nested_100000_deep_is_refused(bundle, watched_load, where):
    deep = "[" * 100_000 + "]" * 100_000
    if where == "extension":
        document = manifest_document(bundle)
        text = json.dumps({**document, "x-deep": None}).replace('"x-deep": null',
                                                                 f'"x-deep": {deep}')
    else:
        text = deep
    write_manifest(bundle, text)
    refused(watched_load, AREA_MANIFEST, "JSON nested 100,000 deep (inside an `x-` extension, "
            "and as the whole document)", r"nested too deeply to be a manifest")


MANIFEST_FAULTS = [
    ("integer-10000-digits", lambda d: d["time"].__setitem__("base_step", "INT"),
     r"not valid JSON"),
    ("base-step-1e999", lambda d: d["time"].__setitem__("base_step", "1E999"),
     r"`time\.base_step` must be a finite number; got inf"),
    ("nan-in-mean", lambda d: d["normalization"].__setitem__("mean", ["NAN", 0.0]),
     r"contains NaN; only finite numbers are allowed"),
    ("unknown-field", lambda d: d.__setitem__("executable", "rm -rf /"),
     r"unknown fields \['executable'\]"),
    ("future-version", lambda d: d.__setitem__("format_version", 2),
     r"`format_version` is 2; this reader knows version 1 only"),
    ("duplicate-stride", lambda d: d["levels"][1].__setitem__("stride", 1),
     r"strides must be distinct"),
    ("duplicate-file", lambda d: d["levels"][1].__setitem__("file", d["levels"][0]["file"]),
     r"files must be distinct"),
    ("stride-zero", lambda d: d["levels"][0].__setitem__("stride", 0),
     r"`levels\[0\]\.stride` \(0\) must be a positive number of base steps\."),
    ("stride-float", lambda d: d["levels"][0].__setitem__("stride", 1.5),
     r"`levels\[0\]\.stride` \(1\.5\) is not an integer; strides are whole base steps\."),
    ("sha-uppercase", lambda d: d["levels"][0].__setitem__("sha256", "A" * 64),
     r"64 lowercase hexadecimal digits"),
    ("levels-not-list", lambda d: d.__setitem__("levels", {"1": "x"}),
     r"`levels` must be a non-empty list"),
    ("scale-zero", lambda d: d["normalization"].__setitem__("scale", [0.0, 1.0]),
     r"`normalization\.scale` must be > 0"),
]


@pytest.mark.parametrize(("change", "pattern"), [case[1:] for case in MANIFEST_FAULTS],
                         ids=[case[0] for case in MANIFEST_FAULTS])
def test_malformed_manifest_is_refused(bundle, watched_load, change, pattern):
    document = manifest_document(bundle)
    change(document)
    text = (json.dumps(document).replace('"INT"', "9" * 10_000).replace('"1E999"', "1e999")
            .replace('"NAN"', "NaN"))
    write_manifest(bundle, text)
    refused(watched_load, AREA_MANIFEST, "malformed values: 10,000-digit integer, 1e999, NaN, "
            "unknown field, future version, duplicate strides/files, bad stride/sha/scale",
            pattern)


@pytest.mark.parametrize(("data", "pattern"), [
    (b"\xff\xfe{}", r"not valid JSON"),
    (b"{}", r"the manifest lacks the required fields"),
    (b"", r"not valid JSON"),
    (b"[]", r"must be a JSON object; got list"),
], ids=["not-utf8", "empty-object", "empty", "array"])
def test_manifest_that_is_not_a_json_object_is_refused(bundle, watched_load, data, pattern):
    write_manifest(bundle, data)
    refused(watched_load, AREA_MANIFEST, "manifest not UTF-8, empty, `{}`, or an array",
            pattern)


def test_huge_manifest_under_the_limit_is_refused_at_the_first_missing_file(bundle,
                                                                            watched_load):
    document = manifest_document(bundle)
    document["levels"] = [{"stride": stride, "file": f"levels/x{stride}.onnx",
                           "sha256": "0" * 64} for stride in range(1, 8_001)]
    write_manifest(bundle, json.dumps(document))
    assert (bundle / "manifest.json").stat().st_size < 1024 * 1024
    refused(watched_load, AREA_MANIFEST, "manifest just under 1 MiB listing 8,000 levels "
            "that do not exist", r"`levels\[0\]\.file` names 'levels/x1\.onnx', which is "
            r"missing")


def test_control_the_watch_sees_a_read_of_the_outside_file(tmp_path, bundle, watched_load):
    """Control for the atime watch: reading outside.onnx itself is visible (on relatime and
    strictatime mounts), so an unchanged atime in the tests above means it was not read."""
    outside = tmp_path / "outside.onnx"
    os.utime(outside, (OLD_TIME, os.stat(outside).st_mtime))
    outside.read_bytes()
    assert (os.stat(outside).st_atime > OLD_TIME) == watched_load.atime_works


# Regression (found by this suite, fixed): runtime/manifest.py accepts any positive stride and
# StridePlanner allocates Python lists of the largest stride's length at load: stride 2**40 raises
# MemoryError instead of BundleError; stride 4,000,000 takes ~50 s and ~1.5 GB (measured). Needs a
# stride limit.
def test_huge_stride_is_refused_with_bundle_error(bundle):
    data = (bundle / "levels/stride-00004.onnx").read_bytes()
    (bundle / "levels/stride-00004.onnx").unlink()
    (bundle / "levels/stride-huge.onnx").write_bytes(data)

    def change(document):
        document["levels"][1].update(stride=2**40, file="levels/stride-huge.onnx")
    edit_manifest(bundle, change)
    with pytest.raises(BundleError, match=r"stride"):
        load(bundle)
