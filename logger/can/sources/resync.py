"""python-can's log readers, made to go on after a damaged record.

python-can's readers are generators: the first line or object they cannot parse raises, and the
generator is gone with every frame after it. Here the parsing stays python-can's own (so every
frame read is the very frame python-can gives), only the driving changes:

* text formats (``.asc``, ``.csv``, ``.trc``): the reader is fed the file line by line through a
  small file-like object; when it raises, the line it was on is counted as damaged and a fresh
  reader is started on the lines after it, fed the file's header lines (everything before the
  first frame: version, columns, number base, start time) again first;
* ``.blf``: objects carry their sizes, so a damaged object is skipped: the next ``LOBJ``
  signature is searched for, in the file (outer containers) and inside a container's data (inner
  objects); a container that does not decompress is decompressed as far as it goes.

Every damaged place is reported through a callback ``bad(where, why, lost)`` with ``where`` a
line number (text) or byte offset (BLF), so the source can count and note it.
"""

from __future__ import annotations

import struct
import zlib
from collections.abc import Callable, Iterator
from typing import IO

import can
from can.io.blf import (
    LOG_CONTAINER,
    LOG_CONTAINER_STRUCT,
    NO_COMPRESSION,
    OBJ_HEADER_BASE_STRUCT,
    ZLIB_DEFLATE,
    BLFReader,
)

Bad = Callable[[str, str, str], None]
#: Bytes fed to zlib at a time, so that a damaged stream still gives what came before the damage.
_INFLATE_PIECE = 4096
_SIG = b"LOBJ"


def _one_line(exc: BaseException) -> str:
    text = str(exc).strip().splitlines()
    return f"{type(exc).__name__}: {text[0]}" if text else type(exc).__name__


class _LineFeed:
    """A text file handed to a python-can reader one line at a time (header lines first)."""

    def __init__(self, lines: Iterator[str], head: list[str]) -> None:
        self._lines = lines
        self._head = list(head)
        self.line_no = 0  # number of the last real line handed over (1-based)
        self.last = ""
        self.taken: list[str] = []  # real lines handed over since the last frame

    def __iter__(self) -> _LineFeed:
        return self

    def __next__(self) -> str:
        if self._head:
            return self._head.pop(0)
        line = next(self._lines)
        self.line_no += 1
        self.last = line
        self.taken.append(line)
        return line

    def readline(self) -> str:
        try:
            return next(self)
        except StopIteration:
            return ""

    def read(self, size: int = -1) -> str:
        return "".join(self) if size < 0 else self.readline()

    def close(self) -> None:
        pass


def read_text(
    cls: type[can.io.generic.MessageReader],
    f: IO[str],
    bad: Bad,
    kwargs: dict | None = None,
) -> Iterator[tuple[can.Message, int]]:
    """(frame, line number) of every line python-can's ``cls`` reads from ``f``; a line it
    raises on is reported with ``bad`` and the reading goes on after it."""
    lines = iter(f)
    feed = _LineFeed(lines, [])
    head: list[str] | None = None  # the lines before the first frame, replayed on a restart
    while True:
        started_at = feed.line_no
        try:
            reader = cls(feed, **(kwargs or {}))
            for msg in reader:
                if head is None:
                    head = feed.taken[:-1]
                feed.taken = []
                yield msg, feed.line_no
            return
        except Exception as exc:  # noqa: BLE001 - python-can raises anything on junk
            if head is None and feed.line_no == 0:
                raise
            bad(f"line {feed.line_no}", f"unreadable ({_one_line(exc)}): "
                f"{feed.last.strip()[:40]!r}", "line skipped")
            if head is None:  # damage before the first frame: keep what set up the reader
                head = feed.taken[:-1]
            if feed.line_no == started_at:  # the reader fails on the header itself
                return
            line_no = feed.line_no
            feed = _LineFeed(lines, head)
            feed.line_no = line_no


class ResyncBLFReader(BLFReader):
    """python-can's BLF reader that skips a damaged object instead of stopping.

    ``bad(where, why, lost)`` is called for each damaged place with its byte offset (outer
    objects) or container offset (inner objects).
    """

    def __init__(self, file, bad: Bad) -> None:
        super().__init__(file)
        self._bad = bad
        self._container_at = 0

    def _find_next(self, at: int) -> int | None:
        """File offset of the next ``LOBJ`` at or after ``at`` (None at the end)."""
        self.file.seek(at)
        carry = b""
        base = at
        while True:
            block = self.file.read(1 << 16)
            if not block:
                return None
            buf = carry + block
            k = buf.find(_SIG)
            if k >= 0:
                return base - len(carry) + k
            carry = buf[-3:]
            base += len(block)

    def __iter__(self) -> Iterator[can.Message]:
        while True:
            at = self.file.tell()
            data = self.file.read(OBJ_HEADER_BASE_STRUCT.size)
            if not data:
                break
            if len(data) < OBJ_HEADER_BASE_STRUCT.size:
                self._bad(f"offset {at}", "file ends inside an object header", "cut")
                break
            signature, _, _, obj_size, obj_type = OBJ_HEADER_BASE_STRUCT.unpack(data)
            if signature != _SIG or obj_size < OBJ_HEADER_BASE_STRUCT.size:
                nxt = self._find_next(at + 1)
                self._bad(f"offset {at}", "no object header here",
                          f"{(nxt if nxt is not None else self.file.tell()) - at} bytes skipped")
                if nxt is None:
                    break
                self.file.seek(nxt)
                continue
            obj_data = self.file.read(obj_size - OBJ_HEADER_BASE_STRUCT.size)
            self.file.read(obj_size % 4)
            if obj_type != LOG_CONTAINER:
                continue
            self._container_at = at
            yield from self._container(at, obj_data)
        self.stop()

    def _container(self, at: int, obj_data: bytes) -> Iterator[can.Message]:
        try:
            method, _ = LOG_CONTAINER_STRUCT.unpack_from(obj_data)
        except struct.error:
            self._bad(f"offset {at}", "container cut short", "container skipped")
            return
        body = obj_data[LOG_CONTAINER_STRUCT.size :]
        if method == NO_COMPRESSION:
            data = body
        elif method == ZLIB_DEFLATE:
            data = self._inflate(at, body)
        else:
            self._bad(f"offset {at}", f"unknown compression method {method}",
                      "container skipped")
            return
        yield from self._parse_container(data)

    def _inflate(self, at: int, body: bytes) -> bytes:
        z = zlib.decompressobj()
        out = []
        for i in range(0, len(body), _INFLATE_PIECE):
            try:
                out.append(z.decompress(body[i : i + _INFLATE_PIECE]))
            except zlib.error as exc:
                self._bad(f"offset {at}", f"container does not decompress ({exc})",
                          f"its objects after {sum(map(len, out))} bytes of data lost")
                self._tail = b""  # what was carried over cannot be continued either
                break
        return b"".join(out)

    def _parse_container(self, data: bytes) -> Iterator[can.Message]:
        """Objects of a container's data, each checked before python-can parses it alone.

        An object is taken when its header is plausible and no other object starts inside
        it (a damaged size would swallow its neighbours); one that continues in the next
        container is carried over, as python-can does.
        """
        if self._tail:
            data = b"".join((self._tail, data))
        self._tail = b""
        pos, n = 0, len(data)
        while True:
            k = data.find(_SIG, pos, pos + 8)  # objects are padded to 4 bytes
            if k < 0:
                if pos + 8 > n:
                    self._tail = data[pos:]
                    return
                k = self._skip(data, pos, "no object header here")
                if k < 0:
                    return
            if k + OBJ_HEADER_BASE_STRUCT.size > n:
                self._tail = data[k:]
                return
            _, hsize, version, size, _ = OBJ_HEADER_BASE_STRUCT.unpack_from(data, k)
            inside = data.find(_SIG, k + 4, min(k + max(size, 4) + 3, n))
            if not (version in (1, 2) and OBJ_HEADER_BASE_STRUCT.size <= hsize <= size) \
                    or inside >= 0:
                pos = self._skip(data, k, f"object header (size {size}, version {version}) "
                                 "does not fit")
                if pos < 0:
                    return
                continue
            if k + size > n:  # continues in the next container
                self._tail = data[k:]
                return
            self._pos = 0
            try:
                yield from self._parse_data(data[k : k + size])
            except Exception as exc:  # noqa: BLE001 - python-can raises anything on junk
                self._bad(f"container at offset {self._container_at}",
                          f"object at {k} unreadable ({_one_line(exc)})", "object skipped")
            pos = k + size

    def _skip(self, data: bytes, at: int, why: str) -> int:
        """Report damage at ``at``; the offset of the next object header (-1: none)."""
        nxt = data.find(_SIG, at + 1)
        self._bad(f"container at offset {self._container_at}", f"at {at}: {why}",
                  f"{(nxt if nxt >= 0 else len(data)) - at} bytes skipped")
        return nxt
