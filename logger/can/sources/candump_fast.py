"""candump ``.log`` files parsed with numpy, block by block (~several M frames/s).

The canonical line python-can and candump write,
``(1700000000.123456) can0 0A0#0102030405060708`` with an optional `` R``/`` T`` direction,
``#R``/``#R<dlc>`` for remote frames and ``##<flags><data>`` for CAN FD, is parsed for a whole
block of lines at once: the positions of ``(``, ``)``, spaces and ``#`` are found with
``np.flatnonzero``, the fields gathered into small fixed-width character arrays and converted by
table lookups. Any line that is not in the canonical form is handed to python-can's own
candump reader, one line at a time, so that every line python-can reads gives the very same
frame; a line it cannot read either is counted in ``bad_records``, reported (first few) with its
line number, and skipped. Memory stays bounded by the block size.

Timestamps are exact: ``digits / 10**decimals`` with both numbers exact in float64 is one
correctly rounded division, the same double Python's ``float()`` gives for the decimal string.
"""

from __future__ import annotations

import gzip
import io
import os
from collections.abc import Iterator
from functools import lru_cache
from typing import BinaryIO

import can
import numpy as np

from crankbeat.errors import FormatError, SourceError
from crankbeat.logger.can.sources.base import CanSource, FrameBatch

#: Bytes read per block; a block's lines are parsed together.
BLOCK_BYTES = 4 * 1024 * 1024
#: Unreadable lines before the first frame that make a file "not a candump log".
NOT_CANDUMP_AFTER = 20
#: A "line" longer than this without a newline is junk, not a frame.
MAX_LINE_BYTES = 4096

_CAN_ERR_FLAG = 0x20000000
_CAN_ERR_BUSERROR = 0x00000080
#: Padding after a block's bytes: the widest fixed-width window read from a line.
_PAD = MAX_LINE_BYTES + 256
_EXPECTED = "expected '(seconds) interface id#hexdata'"

_HEX = np.full(256, 255, dtype=np.uint8)
for _i, _c in enumerate(b"0123456789abcdef"):
    _HEX[_c] = _i
for _i, _c in enumerate(b"ABCDEF"):
    _HEX[_c] = 10 + _i
_DIGIT = np.full(256, 255, dtype=np.uint8)
for _i in range(10):
    _DIGIT[ord("0") + _i] = _i
_POW10 = 10 ** np.arange(19, dtype=np.int64)
_WS_CHARS = [9, 10, 11, 12, 13, 32]
_WS = np.zeros(256, dtype=bool)
_WS[_WS_CHARS] = True


# character classes as bit flags, for checking a whole line against a template at once
_C_DIGIT, _C_HEX, _C_DOT, _C_CLOSE, _C_SPACE, _C_WORD, _C_OPEN, _C_ANY = 1, 2, 4, 8, 16, 32, 64, 128
_CLASS = np.full(256, _C_ANY | _C_WORD, dtype=np.uint8)
_CLASS[_WS_CHARS] &= ~np.uint8(_C_WORD)
_CLASS[_HEX != 255] |= _C_HEX
_CLASS[_DIGIT != 255] |= _C_DIGIT
_CLASS[ord(".")] |= _C_DOT
_CLASS[ord(")")] |= _C_CLOSE
_CLASS[ord("(")] |= _C_OPEN
_CLASS[ord(" ")] |= _C_SPACE


@lru_cache(maxsize=256)
def _template(tl: int, dp: int, cl: int, il: int, pl: int, tail: int) -> np.ndarray:
    """Per column of a line of this shape, the character class it must have (any bit)."""
    t = [_C_OPEN] + [_C_DIGIT] * (dp - 1) + [_C_DOT] + [_C_DIGIT] * (tl - dp)
    t += [_C_CLOSE, _C_SPACE] + [_C_WORD] * cl + [_C_SPACE] + [_C_HEX] * il + [_C_ANY]
    t += [_C_HEX] * pl + ([_C_SPACE, _C_ANY] if tail else [])  # direction: checked before
    t += [_C_ANY] * (-len(t) % 8)  # whole uint64 words; the bytes after the line pass
    return np.array(t, dtype=np.uint8)


def _hex_value(c: np.ndarray) -> np.ndarray:
    """Value of hex digit characters (0-9, A-F, a-f) by arithmetic; garbage elsewhere."""
    return (c & np.uint8(0x0F)) + np.uint8(9) * (c >> np.uint8(6))


def _landmarks(buf: np.ndarray, s: np.ndarray, e: np.ndarray, *, guesses: int = 4
               ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Positions of ``)``, ``.`` and ``#`` in each line.

    Lines of a log mostly share one layout, so the offsets of a sample line are tried on all
    lines at once (three 1-D lookups instead of three passes over the block); up to
    ``guesses`` layouts are tried, and lines fitting none are searched. A fitting guess need
    not be the first occurrence of the character: the caller checks every column of the line
    against its template anyway.
    """
    n = len(s)
    close, dot, hsh = (np.full(n, len(buf), np.int64) for _ in range(3))
    todo = np.arange(n)
    for _ in range(guesses):
        if not len(todo):
            return close, dot, hsh
        r = int(todo[0])
        line = buf[s[r] : e[r]].tobytes()
        oc = line.find(b")")
        od, oh = line.find(b"."), line.find(b"#", oc + 1)
        if min(oc, od, oh) < 0:
            break
        st = s[todo]
        fit = ((buf[st + oc] == ord(")")) & (buf[st + od] == ord("."))
               & (buf[st + oh] == ord("#")) & (st + oh < e[todo]))
        hit = todo[fit]
        close[hit], dot[hit], hsh[hit] = s[hit] + oc, s[hit] + od, s[hit] + oh
        todo = todo[~fit]
    if len(todo):
        st, et = s[todo], e[todo]
        close[todo] = _per_line(buf, ord(")"), st, et)
        dot[todo] = _per_line(buf, ord("."), st, et)
        hsh[todo] = _first_at_or_after(np.flatnonzero(buf == ord("#")), close[todo] + 1,
                                       len(buf))
    return close, dot, hsh


def _per_line(buf: np.ndarray, char: int, s: np.ndarray, e: np.ndarray) -> np.ndarray:
    """Position of the first ``char`` at or after each line start (``len(buf)`` if none).

    Usually the character occurs once per line and its positions line up with the lines
    directly; only otherwise is each line's first one searched for.
    """
    pos = np.flatnonzero(buf == char)
    if len(pos) == len(s) and len(pos) and bool(np.all((pos >= s) & (pos < e))):
        return pos
    return _first_at_or_after(pos, s, len(buf))


def _first_at_or_after(sorted_pos: np.ndarray, at: np.ndarray, sentinel: int) -> np.ndarray:
    """For each ``at``, the first position in ``sorted_pos`` >= it (``sentinel`` if none)."""
    k = np.searchsorted(sorted_pos, at)
    out = np.full(at.shape, sentinel, dtype=np.int64)
    has = k < len(sorted_pos)
    out[has] = sorted_pos[k[has]]
    return out


def _rows(buf: np.ndarray, first: np.ndarray, width: int) -> np.ndarray:
    """``buf[first[i] : first[i] + width]`` for every i, as an (n, width) array.

    Row-picking from a sliding-window view copies each row in one piece, far cheaper than an
    element-wise gather; ``buf`` must carry ``width`` bytes of padding at its end.
    """
    windows = np.lib.stride_tricks.sliding_window_view(buf, width)
    return windows[np.clip(first, 0, len(windows) - 1)]


def _gather(buf: np.ndarray, first: np.ndarray, width: int) -> np.ndarray:
    return _rows(buf, first, width)


class _Parsed:
    """Columns of one block, before good lines are selected."""

    def __init__(self, n: int, width: int) -> None:
        self.ts = np.zeros(n)
        self.can_id = np.zeros(n, np.uint32)
        self.extended = np.zeros(n, bool)
        self.dlc = np.zeros(n, np.uint8)
        self.data = np.zeros((n, width), np.uint8)
        self.is_error = np.zeros(n, bool)
        self.is_remote = np.zeros(n, bool)
        self.is_fd = np.zeros(n, bool)


def _horner(digits: np.ndarray, base: int, dtype, start: np.ndarray | None = None
            ) -> np.ndarray:
    """Columns of digit values (most significant first) -> integers (continuing ``start``)."""
    acc = np.zeros(digits.shape[0], dtype=dtype) if start is None else start
    b = dtype(base)
    for j in range(digits.shape[1]):
        acc *= b
        acc += digits[:, j]
    return acc


def _parse_uniform(buf: np.ndarray, s: np.ndarray, e: np.ndarray) -> tuple[np.ndarray, _Parsed]:
    """The common case, fast: classic data or error frames, lines grouped by their shape.

    Lines whose field offsets are all equal (same timestamp width and decimal point, channel
    name, id width, data length, direction suffix) are gathered into one 2-D character array,
    where every field sits in fixed columns. Anything else (remote, FD, odd shapes) is left
    with ok=False for :func:`_parse_canonical`.
    """
    n = len(s)
    cols = _Parsed(n, 8)
    ok = np.zeros(n, bool)
    close, dot, hsh = _landmarks(buf, s, e)
    dot = dot - s
    # the id is 3 or 8 hex digits after the channel's space; the direction, if any, is " R"
    id_len = np.where(buf[np.maximum(hsh - 4, 0)] == ord(" "), 3,
                      np.where(buf[np.maximum(hsh - 9, 0)] == ord(" "), 8, 0))
    sp2 = hsh - id_len - 1
    tail = np.where(buf[np.maximum(e - 2, 0)] == ord(" "), 2, 0)
    t_len, ch_len, plen = close - s - 1, sp2 - close - 2, e - tail - hsh - 1
    shaped = ((buf[s] == ord("(")) & (close < e) & (hsh < e) & (hsh > close) & (dot < t_len)
              & (dot >= 2) & (t_len <= 18) & (ch_len >= 1) & (ch_len < 64) & (id_len > 0)
              & (plen >= 0) & (plen <= 16) & (plen % 2 == 0)
              & ((tail == 0) | ((buf[np.maximum(e - 1, 0)] | 0x20) == ord("r"))
                 | ((buf[np.maximum(e - 1, 0)] | 0x20) == ord("t"))))
    cand = np.flatnonzero(shaped)
    if not len(cand):
        return ok, cols
    key = ((((t_len[cand] * 32 + dot[cand]) * 64 + ch_len[cand]) * 16 + id_len[cand]) * 32
           + plen[cand]) * 2 + tail[cand] // 2
    order = np.argsort(key, kind="stable")
    ks = key[order]
    bounds = np.flatnonzero(np.diff(ks)) + 1
    for rows in np.split(cand[order], bounds):  # one group per line shape
        r0 = rows[0]
        tl, dp, cl = int(t_len[r0]), int(dot[r0]), int(ch_len[r0])
        il, pl, tl2 = int(id_len[r0]), int(plen[r0]), int(tail[r0])
        tpl = _template(tl, dp, cl, il, pl, tl2)
        m = _rows(buf, s[rows], len(tpl))
        h = tl + 4 + cl + il  # column of '#'
        # every template entry is one class bit: compare 8 columns at a time as uint64
        # (np.take is faster than fancy indexing for a byte lookup table)
        good = ((np.take(_CLASS, m) & tpl).view(np.uint64) == tpl.view(np.uint64)).all(1)
        v = _hex_value(m[:, : h + 1 + pl])
        val = _horner(v[:, dp + 1 : tl + 1], 10, np.int64,
                      start=_horner(v[:, 1:dp], 10, np.int64))
        good &= val < 2**53  # beyond that float(val) is not exact; python-can's path takes it
        ts = val.astype(np.float64) / float(10 ** (tl - dp))
        raw_id = _horner(v[:, h - il : h], 16, np.uint32)
        dn = v[:, h + 1 : h + 1 + pl]
        data = (dn[:, 0::2] << 4) | dn[:, 1::2]
        rows = rows[good]
        raw_id = raw_id[good]
        ok[rows] = True
        cols.ts[rows] = ts[good]
        err = ((raw_id & _CAN_ERR_FLAG) != 0) & ((raw_id & _CAN_ERR_BUSERROR) != 0)
        cols.can_id[rows] = np.where(err, 0, raw_id & np.uint32(0x1FFFFFFF))
        cols.extended[rows] = (il > 3) | err
        cols.dlc[rows] = np.where(err, 0, pl // 2)
        cols.is_error[rows] = err
        if pl:
            d = data[good]
            cols.data[rows, : pl // 2] = np.where(err[:, None], 0, d) if err.any() else d
    return ok, cols


def _parse_canonical(buf: np.ndarray, s: np.ndarray, e: np.ndarray) -> tuple[np.ndarray, _Parsed]:
    """Parse lines ``buf[s:e]`` that are in canonical form; returns (ok mask, columns)."""
    n = len(s)
    end = len(buf)
    paren = np.flatnonzero(buf == ord(")"))
    space = np.flatnonzero(buf == ord(" "))
    hashes = np.flatnonzero(buf == ord("#"))

    ok = buf[s] == ord("(")
    close = _first_at_or_after(paren, s, end)
    ok &= close < e
    close = np.where(ok, close, s)
    ok &= buf[np.minimum(close + 1, end - 1)] == ord(" ")
    sp2 = _first_at_or_after(space, close + 2, end)
    ok &= (sp2 > close + 2) & (sp2 < e)
    hsh = _first_at_or_after(hashes, sp2, end)
    ok &= hsh < e
    id_len = hsh - sp2 - 1
    ok &= (id_len >= 1) & (id_len <= 8)
    pe = _first_at_or_after(space, hsh, end)
    suffix = pe < e
    # a direction suffix is exactly " R"/" T" (either case) ending the line
    last = buf[np.maximum(e - 1, 0)] | 0x20
    ok &= ~suffix | ((pe == e - 2) & ((last == ord("r")) | (last == ord("t"))))
    pe = np.minimum(pe, e)

    # --- timestamp: digits '.' digits
    t_len = close - s - 1
    wt = int(min(max(int(t_len[ok].max(initial=1)), 1), 20))
    ok &= (t_len >= 1) & (t_len <= wt)
    tch = _gather(buf, s + 1, wt)
    inside = np.arange(wt)[None, :] < t_len[:, None]
    dig = _DIGIT[tch]
    is_dot = (tch == ord(".")) & inside
    is_dig = (dig != 255) & inside
    ok &= (is_dot.sum(1) == 1) & ((is_dig | is_dot) == inside).all(1)
    ndig = is_dig.sum(1)
    ok &= (ndig >= 1) & (ndig <= 16)
    after = ndig[:, None] - np.cumsum(is_dig, axis=1)  # digits to the right of each digit
    val = np.where(is_dig, dig.astype(np.int64) * _POW10[np.clip(after, 0, 18)], 0).sum(1)
    dot_at = np.argmax(is_dot, axis=1)
    decimals = t_len - dot_at - 1
    ok &= val < 2**53  # beyond that float(val) is not exact; python-can's path takes it
    cols = _Parsed(n, 8)
    cols.ts = val.astype(np.float64) / _POW10[np.clip(decimals, 0, 18)].astype(np.float64)

    # --- id: 1..8 hex digits, right-aligned into 8 nibbles
    ich = _gather(buf, hsh - 8, 8)
    nib = _HEX[ich]
    used = np.arange(8)[None, :] >= (8 - id_len)[:, None]
    ok &= ((nib != 255) | ~used).all(1)
    nib = np.where(used, nib, 0).astype(np.uint32)
    raw_id = (nib << (4 * np.arange(7, -1, -1, dtype=np.uint32))[None, :]).sum(1, dtype=np.uint32)
    cols.extended = id_len > 3
    cols.can_id = raw_id & np.uint32(0x1FFFFFFF)
    err = ((raw_id & _CAN_ERR_FLAG) != 0) & ((raw_id & _CAN_ERR_BUSERROR) != 0)

    # --- payload kinds
    p0 = hsh + 1
    plen = pe - p0
    c0 = np.where(plen > 0, buf[np.minimum(p0, end - 1)], 0)
    fd = c0 == ord("#")
    remote = ((c0 | 0x20) == ord("r")) & (plen > 0)
    fd_flag = _DIGIT[buf[np.minimum(p0 + 1, end - 1)]]
    ok &= ~fd | ((plen >= 2) & (fd_flag != 255))
    # remote: 'R' then an optional decimal DLC of at most two digits
    rd_len = plen - 1
    rch = _gather(buf, p0 + 1, 2)
    rdig = _DIGIT[rch]
    r_used = np.arange(2)[None, :] < rd_len[:, None]
    ok &= ~remote | ((rd_len <= 2) & ((rdig != 255) | ~r_used).all(1))
    r_dlc = np.where(rd_len == 2, rdig[:, 0].astype(np.int64) * 10 + rdig[:, 1], rdig[:, 0])
    r_dlc = np.where(rd_len <= 0, 0, r_dlc)

    d0 = np.where(fd, p0 + 2, p0)
    dlen = np.where(remote, 0, pe - d0)
    limit = np.where(fd, 128, 16)
    ok &= (dlen >= 0) & (dlen % 2 == 0) & (dlen <= limit)
    wd = int(dlen[ok].max(initial=0)) if ok.any() else 0
    if wd:
        dch = _gather(buf, d0, wd)
        dn = _HEX[dch]
        d_used = np.arange(wd)[None, :] < dlen[:, None]
        ok &= ((dn != 255) | ~d_used).all(1)
        dn = np.where(d_used, dn, 0)
        nbytes = (dn[:, 0::2] << 4) | dn[:, 1::2]
    else:
        nbytes = np.zeros((n, 0), np.uint8)
    width = 64 if nbytes.shape[1] > 8 else 8
    cols.data = np.zeros((n, width), np.uint8)
    cols.data[:, : nbytes.shape[1]] = nbytes
    if err.any():  # python-can gives error frames as Message(is_error_frame=True): id 0, no data
        cols.data[err] = 0
    cols.dlc = np.where(remote, r_dlc, dlen // 2).astype(np.uint8)
    cols.dlc[err] = 0
    cols.is_error = err
    cols.is_remote = remote & ~err
    cols.is_fd = fd & ~err
    cols.can_id[err] = 0
    cols.extended[err] = True
    return ok, cols


def _python_can_line(text: bytes) -> can.Message | None:
    """The frame python-can's candump reader makes of one line, or None if it cannot."""
    try:
        line = text.decode("utf-8")
        msgs = list(can.CanutilsLogReader(io.StringIO(line)))
    except Exception:  # noqa: BLE001 - python-can's parser raises anything on junk
        return None
    if len(msgs) != 1:
        return None
    msg = msgs[0]
    if len(msg.data) > (64 if msg.is_fd else 8) or msg.dlc > 255:
        return None
    if not msg.is_remote_frame and len(msg.data) != msg.dlc:
        return None  # an odd number of hex digits: python-can keeps a half byte, we do not
    return msg


class CandumpFastSource(CanSource):
    """Frames of a candump ``.log`` (or ``.log.gz``), parsed in blocks with numpy.

    Parameters
    ----------
    path : str or os.PathLike
        The log file.
    block_bytes : int
        Bytes parsed per block (bounds the memory).

    Raises
    ------
    FormatError
        The first block holds no readable frame at all (not a candump log).
    SourceError
        The file cannot be opened.

    Notes
    -----
    ``FrameBatch.index`` is the 1-based line number of each frame.
    """

    def __init__(self, path: str | os.PathLike, *, block_bytes: int = BLOCK_BYTES) -> None:
        super().__init__()
        self.path = os.fspath(path)
        self.origin = self.path
        self.block_bytes = int(block_bytes)
        try:
            self.size = os.path.getsize(self.path)
            raw: BinaryIO = open(self.path, "rb")  # noqa: SIM115 - closed in close()
        except OSError as exc:
            raise SourceError(f"{self.path}: cannot open CAN log: {exc.strerror}") from None
        self._raw = raw
        self._f: BinaryIO = gzip.GzipFile(fileobj=raw) if self.path.lower().endswith(".gz") else raw
        self.frames_read = 0
        self._bad_before_first = 0
        self._first_bad_line: int | None = None

    def progress(self) -> tuple[float, float | None]:
        try:
            return float(self._raw.tell()), float(self.size)
        except (OSError, ValueError):
            return float(self.size), float(self.size)

    def _bad(self, line_no: int, text: bytes, why: str = _EXPECTED) -> None:
        self.bad_records += 1
        shown = text[:40].decode("utf-8", "replace")
        self.note(f"{self.path} line {line_no}: {why}, found {shown!r}; line skipped")

    def _blocks(self) -> Iterator[tuple[np.ndarray, np.ndarray, np.ndarray, int, bool]]:
        """(buffer, line starts, line ends, number of the first line, final) per block."""
        carry = b""
        line_no = 1
        skipping = False  # inside an overlong line, dropping bytes up to its newline
        while True:
            try:
                chunk = self._f.read(self.block_bytes)
            except (OSError, EOFError, gzip.BadGzipFile) as exc:
                self.bad_records += 1
                self.note(f"{self.path} line {line_no}: cannot read further ({exc}); "
                          "the frames before it were kept")
                chunk = b""
            final = not chunk
            data, carry = carry + chunk, b""
            if skipping:
                k = data.find(b"\n")
                if k < 0:
                    if final:
                        return
                    continue
                data, skipping = data[k + 1 :], False
                line_no += 1
            cut = len(data) if final else data.rfind(b"\n") + 1
            body, rest = data[:cut], data[cut:]
            if len(rest) > MAX_LINE_BYTES:
                self._bad(line_no + body.count(b"\n"), rest,
                          f"line longer than {MAX_LINE_BYTES} bytes")
                rest, skipping = b"", True
            carry = rest
            if body:
                buf = np.frombuffer(body, dtype=np.uint8)
                nl = np.flatnonzero(buf == 10)
                ends = nl if body.endswith(b"\n") else np.append(nl, len(buf))
                # padding: fixed-width windows may run past the last line
                buf = np.concatenate((buf, np.full(_PAD, 10, np.uint8)))
                starts = np.concatenate(([0], ends[:-1] + 1)).astype(np.int64)
                yield buf, starts, ends.astype(np.int64), line_no, final
                line_no += len(ends)
            if final:
                return

    def batches(self, max_frames: int = 65536) -> Iterator[FrameBatch]:
        for buf, s, e, first_line, _ in self._blocks():
            # python-can strips each line; strip the usual whitespace the same way
            for _ in range(4):
                if not (_WS[buf[np.maximum(e - 1, 0)]].any() or _WS[buf[s]].any()):
                    break
                trail = (e > s) & _WS[buf[np.maximum(e - 1, 0)]]
                e = e - trail
                lead = (e > s) & _WS[buf[np.minimum(s, len(buf) - 1)]]
                s = s + lead
            blank = e <= s
            ok, cols = _parse_uniform(buf, s, e)
            ok &= ~blank
            rest = np.flatnonzero(~ok & ~blank)
            if len(rest):  # remote, FD, unusual widths: the general vectorised parser
                ok2, cols2 = _parse_canonical(buf, s[rest], e[rest])
                self._merge(cols, cols2, rest, ok2)
                ok[rest[ok2]] = True
            odd = np.flatnonzero(~ok & ~blank)
            body = buf.tobytes() if len(odd) else b""
            for i in odd:
                msg = _python_can_line(body[s[i] : e[i]])
                if msg is None:
                    self._bad(first_line + int(i), body[s[i] : e[i]])
                    continue
                self._fill(cols, int(i), msg)
                ok[i] = True
            good = np.flatnonzero(ok)
            if self.frames_read == 0:
                self._check_is_candump(first_line, ok, blank)
            self.frames_read += len(good)
            for a in range(0, len(good), max_frames):
                sel = good[a : a + max_frames]
                data = cols.data[sel]
                if data.shape[1] > 8 and not (cols.dlc[sel] > 8).any():
                    data = data[:, :8]
                yield FrameBatch(
                    ts=cols.ts[sel], can_id=cols.can_id[sel], extended=cols.extended[sel],
                    dlc=cols.dlc[sel], data=np.ascontiguousarray(data),
                    is_error=cols.is_error[sel], is_remote=cols.is_remote[sel],
                    is_fd=cols.is_fd[sel], index=sel.astype(np.int64) + first_line,
                    origin=self.path, index_kind="line",
                )
        if self.frames_read == 0 and self._bad_before_first:
            raise FormatError(f"{self.path}: line {self._first_bad_line}: not a candump log "
                              f"({_EXPECTED})")

    def _check_is_candump(self, first_line: int, ok: np.ndarray, blank: np.ndarray) -> None:
        """Before the first frame: give up on a file whose first lines are all unreadable.

        :data:`NOT_CANDUMP_AFTER` bad lines before any good one (or a whole file of them) make
        it "not a candump log"; fewer are skipped like any bad line. The rule depends on the
        lines only, never on the block size.
        """
        first_good = int(np.argmax(ok)) if ok.any() else len(ok)
        bad_before = np.flatnonzero(~ok[:first_good] & ~blank[:first_good])
        if self._first_bad_line is None and len(bad_before):
            self._first_bad_line = first_line + int(bad_before[0])
        self._bad_before_first += len(bad_before)
        if self._bad_before_first >= NOT_CANDUMP_AFTER:
            raise FormatError(f"{self.path}: line {self._first_bad_line}: not a candump log "
                              f"({_EXPECTED})")

    @staticmethod
    def _merge(cols: _Parsed, sub: _Parsed, rows: np.ndarray, ok: np.ndarray) -> None:
        rows, pick = rows[ok], np.flatnonzero(ok)
        if sub.data.shape[1] > cols.data.shape[1]:
            cols.data = np.pad(cols.data, ((0, 0), (0, sub.data.shape[1] - cols.data.shape[1])))
        for name in ("ts", "can_id", "extended", "dlc", "is_error", "is_remote", "is_fd"):
            getattr(cols, name)[rows] = getattr(sub, name)[pick]
        cols.data[rows] = 0
        cols.data[rows, : sub.data.shape[1]] = sub.data[pick]

    @staticmethod
    def _fill(cols: _Parsed, i: int, msg: can.Message) -> None:
        n = len(msg.data)
        if n > cols.data.shape[1]:
            cols.data = np.pad(cols.data, ((0, 0), (0, 64 - cols.data.shape[1])))
        cols.ts[i] = msg.timestamp
        cols.can_id[i] = msg.arbitration_id
        cols.extended[i] = msg.is_extended_id
        cols.dlc[i] = msg.dlc
        cols.data[i] = 0
        cols.data[i, :n] = np.frombuffer(bytes(msg.data), np.uint8)
        cols.is_error[i] = msg.is_error_frame
        cols.is_remote[i] = msg.is_remote_frame
        cols.is_fd[i] = msg.is_fd

    def close(self) -> None:
        if self._f is not self._raw:
            self._f.close()
        self._raw.close()
