"""Turn user paths (files, directories, globs, URIs) into an ordered list of data files of one format."""

from __future__ import annotations

import glob as globlib
import os
import re
from collections.abc import Iterable
from urllib.parse import unquote

import pyarrow as pa
import pyarrow.fs as pafs

from tallfit.errors import DataSourceError

from .base import FileInfo, Located

EXTENSIONS = {
    ".parquet": "parquet", ".pq": "parquet",
    ".csv": "csv", ".tsv": "csv", ".txt": "csv",
    ".jsonl": "jsonl", ".ndjson": "jsonl", ".json": "jsonl",
    ".arrow": "ipc", ".ipc": "ipc", ".feather": "ipc", ".arrows": "ipc",
}
COMPRESSIONS = {".gz": "gzip", ".zst": "zstd", ".zstd": "zstd"}
FORMAT_ALIASES = {
    "parquet": "parquet", "pq": "parquet", "csv": "csv", "tsv": "csv", "txt": "csv",
    "jsonl": "jsonl", "ndjson": "jsonl", "json": "jsonl", "ipc": "ipc", "arrow": "ipc", "feather": "ipc",
}
_URI = re.compile(r"^([A-Za-z][A-Za-z0-9+.-]+)://")
_GLOB_CHARS = ("*", "?", "[")


def normalize_format(fmt: str | None) -> str | None:
    """Map a user format name (parquet, csv, tsv, json, ndjson, arrow, feather...) to a canonical one."""
    if fmt is None:
        return None
    canon = FORMAT_ALIASES.get(str(fmt).strip().lower().lstrip("."))
    if canon is None:
        raise DataSourceError(f"unknown format {fmt!r}; use one of parquet, csv, jsonl, ipc")
    return canon


def detect(name: str) -> tuple[str | None, str | None]:
    """(format, compression) from a file name's extension; format None if not recognised."""
    low = name.lower()
    comp = None
    for suffix, c in COMPRESSIONS.items():
        if low.endswith(suffix):
            comp, low = c, low[: -len(suffix)]
            break
    return EXTENSIONS.get(os.path.splitext(low)[1]), comp


def natural_key(path: str) -> list:
    """Sort key putting 'rack=3' before 'rack=12' and 'part-2' before 'part-10'."""
    return [(0, int(t), t) if t.isdigit() else (1, 0, t) for t in re.split(r"(\d+)", path)]


def _hidden(part: str) -> bool:
    return part.startswith((".", "_"))


def _partition(rel_dirs: list[str]) -> dict[str, str]:
    """Hive key=value directory names -> {key: value} (URL-unquoted)."""
    out: dict[str, str] = {}
    for part in rel_dirs:
        if "=" in part:
            key, _, value = part.partition("=")
            if key:
                out[unquote(key)] = unquote(value)
    return out


def _glob_regex(pattern: str) -> re.Pattern:
    """Regex for a '/'-separated glob with *, **, ? and [...] classes."""
    out, i = [], 0
    while i < len(pattern):
        c = pattern[i]
        if pattern.startswith("**/", i):
            out.append("(?:[^/]*/)*")
            i += 3
            continue
        if pattern.startswith("**", i):
            out.append(".*")
            i += 2
            continue
        if c == "*":
            out.append("[^/]*")
        elif c == "?":
            out.append("[^/]")
        elif c == "[" and "]" in pattern[i + 1:]:
            j = pattern.index("]", i + 1)
            body = pattern[i + 1: j]
            out.append("[" + ("^" + body[1:] if body.startswith("!") else body) + "]")
            i = j
        else:
            out.append(re.escape(c))
        i += 1
    return re.compile("".join(out) + r"\Z")


def _split_glob(path: str, sep: str) -> tuple[str, str]:
    """(literal base directory, rest of the pattern) of a glob."""
    parts = path.split(sep)
    k = next(i for i, p in enumerate(parts) if any(ch in p for ch in _GLOB_CHARS))
    base = sep.join(parts[:k]) or ("." if k == 0 else sep)
    return base, sep.join(parts[k:])


def _without_side_json(entries: list) -> list:
    """Drop bare ``.json`` files (metadata such as a truth or schema record) when the other files
    are of another data format: only .jsonl/.ndjson are unambiguously JSON lines."""
    bare = [e for e in entries if e[0].lower().endswith(".json")]
    if bare and len(bare) < len(entries):
        return [e for e in entries if not e[0].lower().endswith(".json")]
    return entries


class _Collector:
    """Gathers candidate files with their partitions, then keeps the data files of one format."""

    def __init__(self, fmt: str | None) -> None:
        self.fmt = fmt
        self.out: list[Located] = []

    def add(self, display: str, fs: pafs.FileSystem, fs_path: str, size: int, partition: dict[str, str],
            explicit: bool) -> None:
        fmt, comp = detect(display)
        if self.fmt is not None:
            fmt = self.fmt
        elif fmt is None:
            if not explicit:
                return
            raise DataSourceError(f"{display}: cannot tell the file format from its extension; "
                                  f"pass format= (parquet, csv, jsonl or ipc)")
        if comp and fmt in ("parquet", "ipc"):
            raise DataSourceError(f"{display}: {comp}-compressed {fmt} files are not supported; "
                                  f"decompress the file first (Parquet and Arrow compress internally)")
        self.out.append(Located(FileInfo(display, size, fmt, partition), fs, fs_path, comp))

    def add_many(self, entries: list[tuple[str, pafs.FileSystem, str, int, dict[str, str]]],
                 where: str) -> None:
        """Add the data files among `entries` (sorted); with an explicit format and no file carrying its
        extension, every entry is taken (extension-less files written by some tools)."""
        entries = sorted(entries, key=lambda e: natural_key(e[0]))
        known = [e for e in entries if detect(e[0])[0] is not None]
        if self.fmt is not None:
            chosen = [e for e in known if detect(e[0])[0] == self.fmt] or entries
        else:
            chosen = _without_side_json(known)
        if not chosen:
            exts = ", ".join(sorted(EXTENSIONS))
            raise DataSourceError(f"{where} contains no data files (looked for {exts}; hidden and "
                                  f"_underscore files are ignored); pass format= if the files have no extension")
        for e in chosen:
            self.add(*e, explicit=False)


def _walk_local(root: str, display_root: str, part_prefix: list[str]):
    fs = pafs.LocalFileSystem()
    for dirpath, dirnames, filenames in os.walk(root):
        dirnames[:] = sorted(d for d in dirnames if not _hidden(d))
        rel_dirs = os.path.relpath(dirpath, root).split(os.sep) if dirpath != root else []
        for name in filenames:
            if _hidden(name):
                continue
            full = os.path.join(dirpath, name)
            display = os.path.join(display_root, *rel_dirs, name)
            yield display, fs, os.path.abspath(full), os.path.getsize(full), _partition(part_prefix + rel_dirs)


def _expand_local(path: str, col: _Collector) -> None:
    path = os.path.expanduser(path)
    fs = pafs.LocalFileSystem()
    if os.path.isfile(path):
        col.add(path, fs, os.path.abspath(path), os.path.getsize(path), {}, explicit=True)
    elif os.path.isdir(path):
        col.add_many(list(_walk_local(path, path, [])), f"directory {path!r}")
    elif any(ch in path for ch in _GLOB_CHARS):
        base, _ = _split_glob(path, os.sep)
        matches = globlib.glob(path, recursive=True)
        if not matches:
            raise DataSourceError(f"no files match the pattern {path!r}; check the path and the wildcards")
        entries = []
        for m in matches:
            rel = os.path.relpath(m, base).split(os.sep)
            if any(_hidden(p) for p in rel):
                continue
            if os.path.isdir(m):
                entries.extend(_walk_local(m, m, rel))
            elif os.path.isfile(m):
                entries.append((m, fs, os.path.abspath(m), os.path.getsize(m), _partition(rel[:-1])))
        col.add_many(entries, f"the pattern {path!r}")
    else:
        raise DataSourceError(f"{path}: no such file or directory")


def _expand_uri(uri: str, scheme: str, col: _Collector) -> None:
    def from_uri(u: str):
        try:
            return pafs.FileSystem.from_uri(u)
        except (pa.ArrowException, OSError, ValueError) as exc:
            raise DataSourceError(f"{u}: cannot open this location ({exc})") from None

    def listing(fs, base: str):
        sel = pafs.FileSelector(base, recursive=True, allow_not_found=True)
        return [i for i in fs.get_file_info(sel) if i.type == pafs.FileType.File]

    def rel_of(p: str, base: str) -> list[str]:
        return p[len(base):].lstrip("/").split("/")

    show = (lambda p: f"{scheme}://{p}")
    rest = uri[len(scheme) + 3:]
    if any(ch in rest for ch in _GLOB_CHARS):
        base_rest, pattern = _split_glob(rest, "/")
        fs, base = from_uri(f"{scheme}://{base_rest}")
        rx = _glob_regex(pattern)
        entries = []
        for info in listing(fs, base):
            rel = rel_of(info.path, base)
            if not any(_hidden(p) for p in rel) and rx.match("/".join(rel)):
                entries.append((show(info.path), fs, info.path, info.size, _partition(rel[:-1])))
        if not entries:
            raise DataSourceError(f"no files match the pattern {uri!r}; check the path and the wildcards")
        col.add_many(entries, f"the pattern {uri!r}")
        return
    fs, path = from_uri(uri)
    info = fs.get_file_info(path)
    if info.type == pafs.FileType.File:
        col.add(uri, fs, path, info.size, {}, explicit=True)
    elif info.type == pafs.FileType.Directory:
        entries = []
        for f in listing(fs, path):
            rel = rel_of(f.path, path)
            if not any(_hidden(p) for p in rel):
                entries.append((show(f.path), fs, f.path, f.size, _partition(rel[:-1])))
        col.add_many(entries, f"directory {uri!r}")
    else:
        raise DataSourceError(f"{uri}: no such file or directory")


def discover(paths: str | os.PathLike | Iterable, fmt: str | None = None) -> tuple[list[Located], str]:
    """Expand paths in order into data files of one format; returns (files, format)."""
    fmt = normalize_format(fmt)
    items = [paths] if isinstance(paths, (str, bytes, os.PathLike)) else list(paths)
    if not items:
        raise DataSourceError("no input path given")
    col = _Collector(fmt)
    for item in items:
        p = os.fsdecode(item)
        m = _URI.match(p)
        if m:
            _expand_uri(p, m.group(1), col)
        else:
            _expand_local(p, col)
    seen: dict[tuple[int, str], str] = {}
    for loc in col.out:
        key = (id(type(loc.fs)), loc.fs_path)
        if key in seen:
            raise DataSourceError(f"{loc.path} is listed twice (also as {seen[key]}); each file may appear "
                                  f"only once, or its rows would be counted twice")
        seen[key] = loc.path
    formats: dict[str, str] = {}
    for loc in col.out:
        formats.setdefault(loc.info.format, loc.path)
    if len(formats) > 1:
        shown = "; ".join(f"{k} (e.g. {v})" for k, v in formats.items())
        raise DataSourceError(f"the input mixes file formats: {shown}; use one format per data set, "
                              f"e.g. a narrower glob such as 'dir/**/*.parquet'")
    return col.out, next(iter(formats))
