"""Extracts on Hadoop file systems (``hdfs://``, ``s3a://``, ...), reached through Spark's JVM.

On a cluster the extract often lives where every machine reads it but the machine running
ascertain does not mount it. Such an extract is given as a URI and read by Spark; this module
lets the same discovery and hashing code that works on local folders list, open and hash it
through the Hadoop ``FileSystem`` API of the running Spark session (with the file systems and
credentials the user's Spark is configured for), so nothing is copied and the manifest's
hashes are those of the same bytes hashed locally.

:class:`HadoopPath` offers the few ``pathlib.Path`` methods discovery and hashing use
(``/``, ``name``, ``suffix``, ``is_dir``, ``is_file``, ``iterdir``, ``glob``, ``open``,
``stat``); ``str()`` gives the URI Spark reads. It needs the session's JVM, so it is valid
while the session runs. Nothing here imports pyspark: the JVM gateway is handed in.
"""

from __future__ import annotations

import fnmatch
import io
import re
from dataclasses import dataclass, field
from pathlib import Path, PurePosixPath
from types import SimpleNamespace
from typing import Any
from urllib.parse import urlsplit

from pipeline.errors import ExtractError
from pipeline.extract._dbsource import is_database_uri

# Two letters at least, so a Windows drive (C:) is never read as a scheme.
_SCHEME = re.compile(r"^([A-Za-z][A-Za-z0-9+.-]+):")


def is_hadoop_uri(extract: Path | str) -> bool:
    """Whether an extract argument is a URI to read through Spark's Hadoop file systems.

    Text with a scheme that is not a database connection. The command line turns ``file://``
    URIs into local paths (:func:`pipeline.extract.extract_location`), so from there this means
    ``hdfs://``, ``s3a://`` and the like; a library caller may pass ``file://`` as text to read
    a local folder through Hadoop too.
    """
    return (
        isinstance(extract, str) and bool(_SCHEME.match(extract)) and not is_database_uri(extract)
    )


def safe_uri(uri: str) -> str:
    """The URI without any ``user:password@`` part, fit for messages and the manifest."""
    parts = urlsplit(uri)
    if "@" not in parts.netloc:
        return uri
    return parts._replace(netloc=parts.netloc.rsplit("@", 1)[1]).geturl()


def hadoop_name(uri: str) -> str:
    """The last segment of a URI's path: the extract folder's name, without server or path."""
    return PurePosixPath(urlsplit(uri).path).name


def _java_error(err: BaseException) -> str | None:
    """The Java exception's first line (class and message), or None for a Python error.

    py4j raises ``Py4JJavaError``; pyspark turns some Java exceptions into its own
    (``IllegalArgumentException`` for a URI of the wrong file system, ...).
    """
    module = type(err).__module__
    if not module.startswith(("py4j", "pyspark")):
        return None
    java = getattr(err, "java_exception", None)
    text = str(java.toString()) if java is not None else str(err)
    lines = text.strip().splitlines()
    return lines[0] if lines else type(err).__name__


# What Hadoop says when a scheme has no file system: none configured, or its class missing.
_NO_FILE_SYSTEM = re.compile(r"No FileSystem for scheme[^\n]*|Class (\S+) not found")


class HadoopFiles:
    """The Hadoop file systems of a running Spark session.

    Args:
        jvm: The session's py4j JVM view (``spark.sparkContext._jvm``).
        conf: Its Hadoop configuration (``spark.sparkContext._jsc.hadoopConfiguration()``).
    """

    def __init__(self, jvm: Any, conf: Any) -> None:
        self.jvm = jvm
        self.conf = conf

    @classmethod
    def of(cls, spark: Any) -> HadoopFiles:
        """The file systems of a SparkSession."""
        context = spark.sparkContext
        return cls(context._jvm, context._jsc.hadoopConfiguration())

    def folder(self, uri: str) -> HadoopPath:
        """The extract folder a URI names, after checking its scheme has a file system.

        Raises:
            ExtractError: Spark has no file system for the scheme (one sentence naming the
                scheme and the cause), or the file system refuses the URI.
        """
        scheme = uri.split(":", 1)[0].lower()
        root = HadoopPath(uri.rstrip("/") or uri, uri.rstrip("/") or uri, self)
        try:
            root.java_path().getFileSystem(self.conf)
        except Exception as err:
            cause = _java_error(err)
            if cause is None:
                raise
            missing = _NO_FILE_SYSTEM.search(cause)
            if missing:
                said = f"class {missing.group(1)} not found" if missing.group(1) else missing[0]
                raise ExtractError(
                    "Spark has no Hadoop file system for the scheme "
                    f"'{scheme}' ({said}): put its connector on Spark's class path (s3a: "
                    "hadoop-aws, e.g. --spark-conf spark.jars.packages=org.apache.hadoop:"
                    "hadoop-aws:VERSION) or name one with --spark-conf "
                    f"spark.hadoop.fs.{scheme}.impl=CLASS",
                    code="unknown-scheme",
                    where=safe_uri(uri),
                ) from None
            raise ExtractError(
                f"cannot be reached: {cause}", code="unreachable", where=safe_uri(uri)
            ) from None
        return root

    def extract(self, uri: str) -> HadoopPath:
        """The extract a URI names: a folder, or a site mapping file (``.yaml``, ``.yml``).

        A mapping file's paths are relative to its folder, so the file is given with that
        folder as its root: the manifest then names the mapping and the files it maps relative
        to the same folder, as for a local mapping file.

        Raises:
            ExtractError: As :meth:`folder`.
        """
        found = self.folder(uri)
        if found.suffix not in (".yaml", ".yml") or not found.is_file():
            return found
        folder, name = found.uri.rsplit("/", 1)
        return HadoopPath(folder, folder, self) / name


@dataclass(frozen=True, order=True)
class HadoopPath:
    """A file or folder on a Hadoop file system, below an extract's root folder.

    Attributes:
        uri: Its URI as Spark reads it (the root as the user wrote it, then ``/name``...).
        root: The extract folder's URI, which :attr:`relative` is measured from.
    """

    uri: str
    root: str
    files: HadoopFiles = field(compare=False, repr=False)

    def __str__(self) -> str:
        return self.uri

    def __truediv__(self, name: str) -> HadoopPath:
        return HadoopPath(f"{self.uri}/{name}", self.root, self.files)

    @property
    def name(self) -> str:
        """The last segment of the path."""
        return hadoop_name(self.uri)

    @property
    def suffix(self) -> str:
        """The name's last suffix (``.parquet``), as ``Path.suffix``."""
        return PurePosixPath(self.name).suffix

    @property
    def parent(self) -> HadoopPath:
        """The folder holding it (the root stays the root: nothing above it is named)."""
        folder = self.uri.rsplit("/", 1)[0] if "/" in self.uri else self.uri
        if len(folder) <= len(self.root):
            return HadoopPath(self.root, self.root, self.files)
        return HadoopPath(folder, self.root, self.files)

    @property
    def relative(self) -> str:
        """The path below the extract's root, with ``/`` (how the manifest names the file)."""
        return self.uri[len(self.root) :].lstrip("/") or self.name

    def java_path(self) -> Any:
        """The ``org.apache.hadoop.fs.Path`` of this URI."""
        return self.files.jvm.org.apache.hadoop.fs.Path(self.uri)

    def _call(self, what: str, action: Any) -> Any:
        try:
            path = self.java_path()
            return action(path.getFileSystem(self.files.conf), path)
        except Exception as err:
            cause = _java_error(err)
            if cause is None:
                raise
            if "FileNotFoundException" in cause:
                raise FileNotFoundError(f"{safe_uri(self.uri)}: not found") from None
            raise OSError(f"{safe_uri(self.uri)}: cannot {what}: {cause}") from None

    def _status(self) -> Any | None:
        try:
            return self._call("read its status", lambda fs, p: fs.getFileStatus(p))
        except FileNotFoundError:
            return None

    def is_dir(self) -> bool:
        """Whether it is a folder (False when it does not exist)."""
        status = self._status()
        return status is not None and bool(status.isDirectory())

    def is_file(self) -> bool:
        """Whether it is a file (False when it does not exist)."""
        status = self._status()
        return status is not None and bool(status.isFile())

    def exists(self) -> bool:
        """Whether anything is there."""
        return self._status() is not None

    def iterdir(self) -> list[HadoopPath]:
        """The folder's entries, sorted by name."""
        found = self._call("list it", lambda fs, p: fs.listStatus(p))
        return sorted(self / str(status.getPath().getName()) for status in found)

    def glob(self, pattern: str) -> list[HadoopPath]:
        """Entries below the folder matching ``pattern``, level by level (``labs/*.csv``).

        Each ``/``-separated part matches one level's names as ``fnmatch`` does (``*``, ``?``,
        ``[...]``); ``**`` is one level too, not any depth as in ``Path.glob``.
        """
        found = [self]
        for part in (p for p in pattern.split("/") if p not in ("", ".")):
            if not any(c in part for c in "*?["):
                found = [f / part for f in found if (f / part).exists()]
                continue
            found = [
                entry
                for folder in found
                if folder.is_dir()
                for entry in folder.iterdir()
                if fnmatch.fnmatchcase(entry.name, part)
            ]
        return sorted(found)

    def stat(self) -> SimpleNamespace:
        """Its size in bytes, as ``st_size``."""
        status = self._call("read its status", lambda fs, p: fs.getFileStatus(p))
        return SimpleNamespace(st_size=int(status.getLen()))

    def read_text(self, encoding: str = "utf-8") -> str:
        """The whole file as text (a site mapping file: small), as ``Path.read_text``."""
        with self.open() as handle:
            return handle.read().decode(encoding)

    def open(self, mode: str = "rb") -> io.BufferedReader:
        """The file's bytes, streamed from the file system (read only, binary)."""
        if mode != "rb":
            raise ValueError("a Hadoop file is opened for reading bytes only ('rb')")
        size = self.stat().st_size
        stream = self._call("open it", lambda fs, p: fs.open(p))
        return io.BufferedReader(_HadoopStream(stream, size, self.uri), buffer_size=1 << 20)


class _HadoopStream(io.RawIOBase):
    """A Hadoop ``FSDataInputStream`` as a seekable Python binary stream."""

    def __init__(self, stream: Any, size: int, uri: str) -> None:
        super().__init__()
        self._stream = stream
        self._size = size
        self._uri = uri

    def readable(self) -> bool:
        return True

    def seekable(self) -> bool:
        return True

    def readinto(self, buffer: Any) -> int:
        view = memoryview(buffer).cast("B")
        try:
            # InputStream.readNBytes (Java 11+): up to n bytes, fewer only at the end.
            data = bytes(self._stream.readNBytes(len(view)))
        except Exception as err:
            raise OSError(f"{safe_uri(self._uri)}: read failed: {_java_error(err) or err}") from err
        view[: len(data)] = data
        return len(data)

    def seek(self, offset: int, whence: int = io.SEEK_SET) -> int:
        base = {io.SEEK_SET: 0, io.SEEK_CUR: self.tell(), io.SEEK_END: self._size}[whence]
        target = max(0, base + offset)
        self._stream.seek(target)
        return target

    def tell(self) -> int:
        return int(self._stream.getPos())

    def close(self) -> None:
        if not self.closed:
            self._stream.close()
        super().close()
