"""Training data where it lives: Parquet, CSV or Arrow files under operator-allowed roots.

A source is ``{uri, format, columns}``. ``uri`` is a file, a folder or a glob, as a
local path or an fsspec URL; it must fall under one of ``MIXSCORE_SOURCE_ROOTS``
(comma-separated prefixes; none set: no sources). The checks refuse what would lead
elsewhere: ``..`` segments, encoded separators or dots, chained URLs (``::``), and
for local paths a symlink whose target leaves the roots: a local file is resolved
once, and the file opened is checked again through its descriptor, so a symlink
swapped in between the check and the open cannot lead out. A refusal names the
setting, never the roots themselves. Credentials come from the worker's own
environment, as fsspec reads it; a request never carries any.

Rows are read in bounded batches (Parquet by row group, CSV and Arrow by record
batch), so memory holds one batch whatever the source's size. A row with a missing
value is skipped and counted.
"""

from __future__ import annotations

import hashlib
import os
import re
from collections.abc import Iterator
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Literal

import numpy as np

Format = Literal["parquet", "csv", "arrow"]
EXTENSIONS: dict[str, Format] = {".parquet": "parquet", ".pq": "parquet", ".csv": "csv",
                                 ".arrow": "arrow", ".feather": "arrow", ".ipc": "arrow"}
#: Rows per CSV batch (Parquet and Arrow files keep their own row groups and batches).
CSV_BLOCK_BYTES = 4 * 2**20
_URL = re.compile(r"^[a-z][a-z0-9+.-]*://", re.IGNORECASE)
_ENCODED = re.compile(r"%(2f|5c|2e)", re.IGNORECASE)


class SourceError(ValueError):
    """A source that cannot be read as given; the message says why."""


class SourceForbidden(SourceError):
    """A source outside MIXSCORE_SOURCE_ROOTS."""


def roots_of(setting: str) -> list[str]:
    """The prefixes of ``MIXSCORE_SOURCE_ROOTS``."""
    return [root.strip() for root in setting.split(",") if root.strip()]


def checked_uri(uri: str, roots: list[str]) -> str:
    """``uri`` if it falls under one of ``roots``; else SourceForbidden naming the setting."""
    if not roots:
        raise SourceForbidden("sources are off: MIXSCORE_SOURCE_ROOTS names no root")
    if _ENCODED.search(uri):
        raise SourceForbidden(f"{uri!r} has an encoded '/', '\\' or '.'; write them plainly")
    if "::" in uri:
        raise SourceForbidden(f"{uri!r} chains filesystems ('::'); name the file itself")
    parts = re.split(r"[/\\]", _URL.sub("", uri))
    if ".." in parts:
        raise SourceForbidden(f"{uri!r} has a '..' segment")
    for root in roots:
        if _URL.match(root) or _URL.match(uri):
            if _URL.match(root) and _URL.match(uri) and _under(uri, root, "/"):
                return uri
        elif _under(os.path.normpath(uri), os.path.normpath(root), os.sep) and \
                os.path.isabs(uri):
            return uri
    hint = ("; write local files as plain absolute paths"
            if uri.lower().startswith("file://") and not all(_URL.match(r) for r in roots)
            else "")
    raise SourceForbidden(f"{uri!r} is not under the roots this service may read "
                          f"(MIXSCORE_SOURCE_ROOTS){hint}")


def _under(path: str, root: str, separator: str) -> bool:
    root = root.rstrip(separator)
    return path == root or path.startswith(root + separator)


def format_of(uri: str, given: str | None) -> Format:
    if given is not None:
        if given not in ("parquet", "csv", "arrow"):
            raise SourceError(f"format {given!r} is not one of parquet, csv, arrow")
        return given  # type: ignore[return-value]
    suffix = Path(uri.rstrip("/*")).suffix.lower()
    if suffix not in EXTENSIONS:
        raise SourceError(f"the format of {uri!r} does not follow from its extension; give "
                          "format: parquet, csv or arrow")
    return EXTENSIONS[suffix]


@dataclass(frozen=True)
class SourceFile:
    path: str
    size: int
    modified: str  # modification time or ETag: what changes when the file does


@dataclass
class Source:
    """The files of a checked source, its columns, and counts of the last full read."""

    files: list[SourceFile]
    format: Format
    columns: list[str]
    filesystem: Any = field(repr=False, default=None)
    #: For local files: the roots, resolved, that a file opened must still be under.
    local_roots: list[str] | None = None
    rows_read: int = 0
    rows_skipped: int = 0

    @property
    def fingerprint(self) -> str:
        """sha256 of the files' identities (path, size, modification) and the columns:
        it changes when a file does, without re-reading terabytes."""
        digest = hashlib.sha256()
        for item in self.files:
            digest.update(f"{item.path}\0{item.size}\0{item.modified}\n".encode())
        digest.update("\0".join(self.columns).encode())
        return digest.hexdigest()

    def __iter__(self) -> Iterator[np.ndarray]:
        """Complete rows (m, d) in float64, one batch at a time, in file order."""
        count = ReadCount()
        for item in self.files:
            yield from self._complete(self._file(item.path, None), count)
        self.rows_read, self.rows_skipped = count.read, count.skipped

    def parts(self) -> list[Part]:
        """The source cut for distributed passes: a Parquet file per row group (from its
        footer), any other file whole; in the order ``__iter__`` reads them."""
        import pyarrow.parquet

        if self.format != "parquet":
            return [Part(item.path, None) for item in self.files]
        found = []
        for item in self.files:
            with self.open(item.path) as handle:
                groups = pyarrow.parquet.ParquetFile(handle).num_row_groups
            found += [Part(item.path, group) for group in range(groups)]
        return found

    def read(self, part: Part, count: ReadCount) -> Iterator[np.ndarray]:
        """A part's complete rows, as ``__iter__`` gives them; ``count`` adds its rows."""
        return self._complete(self._file(part.path, part.group), count)

    @staticmethod
    def _complete(batches: Iterator[np.ndarray], count: ReadCount) -> Iterator[np.ndarray]:
        for rows in batches:
            keep = ~np.isnan(rows).any(axis=1)
            count.read += rows.shape[0]
            count.skipped += int(rows.shape[0] - keep.sum())
            if keep.any():
                yield rows if keep.all() else rows[keep]

    def _file(self, path: str, group: int | None) -> Iterator[np.ndarray]:
        """A file's batches (one row group's for ``group``); a file gone or broken since it
        was opened is a SourceError (the job fails saying which), not a crash."""
        try:
            with self.open(path) as handle:
                for batch in _batches(handle, self.format, self.columns, group):
                    yield _matrix(batch, self.columns)
        except OSError as error:
            raise SourceError(f"reading {path} failed: {error}") from None


    def open(self, path: str) -> Any:
        """A file of the source, for reading; a local one only if the file opened is
        still under the roots (``open_within``)."""
        if self.local_roots is None:
            return self.filesystem.open(path, "rb")
        return open_within(path, self.local_roots)


def open_within(path: str, roots: list[str]) -> Any:
    """The local file ``path`` opened for reading, if the file opened is under ``roots``
    (resolved paths): its final component is not followed if a symlink, and the path of
    what was opened is read back from its descriptor, so a swap after a check cannot
    lead outside the roots."""
    try:
        descriptor = os.open(path, os.O_RDONLY | os.O_NOFOLLOW)
    except OSError as error:
        raise SourceError(f"reading {path} failed: {error}") from None
    try:
        opened = os.readlink(f"/proc/self/fd/{descriptor}")
        if not any(_under(opened, root, os.sep) for root in roots):
            raise SourceForbidden(f"{path!r} now leads outside the roots this service may "
                                  "read (MIXSCORE_SOURCE_ROOTS)")
    except BaseException:
        os.close(descriptor)
        raise
    return os.fdopen(descriptor, "rb")


@dataclass(frozen=True)
class Part:
    """A file, or one row group of a Parquet file: one task of a distributed pass."""

    path: str
    group: int | None


@dataclass
class ReadCount:
    read: int = 0
    skipped: int = 0


def open_source(uri: str, format: str | None, columns: list[str] | None,
                roots: list[str]) -> Source:
    """The source checked and its schema read: missing files, absent or non-numeric
    columns and unknown formats raise SourceError saying which."""
    try:
        import fsspec
        import pyarrow  # noqa: F401
    except ImportError:
        raise SourceError("reading sources needs pyarrow and fsspec on the fit workers: "
                          "pip install 'mixscore[sources]'") from None
    checked_uri(uri, roots)
    if format is not None:
        format_of(uri, format)
    filesystem, _, paths = fsspec.get_fs_token_paths(uri)
    found: list[str] = []
    for path in paths:
        found += (sorted(filesystem.find(path)) if filesystem.isdir(path) else [path])
    files = [path for path in found if filesystem.isfile(path)]
    if not files:
        raise SourceError(f"{uri!r} names no file")
    known = [path for path in files if Path(path).suffix.lower() in EXTENSIONS]
    kind = format_of((known or files)[0], format)  # a folder's format is its files'
    if format is None:  # markers and other formats in a folder (_SUCCESS, .crc) are left out
        files = [path for path in known if EXTENSIONS[Path(path).suffix.lower()] == kind]
    local_roots = None
    if type(filesystem).__name__ == "LocalFileSystem":
        # Resolved once: the files read are the resolved ones, checked again at open.
        local_roots = [os.path.realpath(r) for r in roots if not _URL.match(r)]
        files = [os.path.realpath(path) for path in files]
        for path in files:
            checked_uri(path, local_roots)
    identities = []
    for path in files:
        info = filesystem.info(path)
        identities.append(SourceFile(path, int(info.get("size") or 0),
                                     str(info.get("mtime") or info.get("ETag")
                                         or info.get("LastModified") or "")))
    source = Source(identities, kind, [], filesystem, local_roots)
    with source.open(files[0]) as handle:
        schema = _schema(handle, kind)
    source.columns = _columns(schema, columns, files[0])
    return source


def _schema(handle: Any, kind: Format) -> Any:
    import pyarrow.csv
    import pyarrow.parquet

    try:
        if kind == "parquet":
            return pyarrow.parquet.ParquetFile(handle).schema_arrow
        if kind == "csv":
            return pyarrow.csv.open_csv(handle).schema
        return _arrow_reader(handle).schema
    except (OSError, ValueError) as error:  # pyarrow's ArrowInvalid is a ValueError
        raise SourceError(f"not a {kind} file: {error}") from None


def _columns(schema: Any, wanted: list[str] | None, path: str) -> list[str]:
    import pyarrow.types as types

    numeric = [f.name for f in schema if types.is_integer(f.type) or types.is_floating(f.type)
               or types.is_decimal(f.type)]
    if wanted is None:
        if not numeric:
            raise SourceError(f"{path} has no numeric column")
        return numeric
    names = set(schema.names)
    for name in wanted:
        if name not in names:
            raise SourceError(f"column {name!r} is not in {path} (it has "
                              f"{', '.join(schema.names)})")
        if name not in numeric:
            raise SourceError(f"column {name!r} of {path} is not numeric "
                              f"({schema.field(name).type})")
    return list(wanted)


def _arrow_reader(handle: Any) -> Any:
    import pyarrow.ipc

    try:
        return pyarrow.ipc.open_file(handle)
    except (OSError, ValueError):
        handle.seek(0)
        return pyarrow.ipc.open_stream(handle)


def _batches(handle: Any, kind: Format, columns: list[str], group: int | None) -> Iterator[Any]:
    import pyarrow.csv
    import pyarrow.parquet

    if kind == "parquet":
        reader = pyarrow.parquet.ParquetFile(handle)
        for index in range(reader.num_row_groups) if group is None else [group]:
            yield reader.read_row_group(index, columns=columns)
    elif kind == "csv":
        yield from pyarrow.csv.open_csv(
            handle, read_options=pyarrow.csv.ReadOptions(block_size=CSV_BLOCK_BYTES),
            convert_options=pyarrow.csv.ConvertOptions(include_columns=columns))
    else:
        reader = _arrow_reader(handle)
        if hasattr(reader, "num_record_batches"):
            for index in range(reader.num_record_batches):
                yield reader.get_batch(index).select(columns)
        else:
            for batch in reader:
                yield batch.select(columns)


def _matrix(batch: Any, columns: list[str]) -> np.ndarray:
    """(rows, columns) float64; nulls become NaN."""
    return np.column_stack([
        np.asarray(batch.column(name).to_numpy(zero_copy_only=False), dtype=np.float64)
        for name in columns])

