"""PNG bytes from RGBA frames, written directly; :class:`FrameEncoder` re-compresses only the
bands of rows that changed since the previous frame.

``encode_png(rgba, compress_level=1) -> bytes``
    One frame, alpha dropped (the figures are opaque). No row filters, zlib at a low level: at
    notebook sizes several times faster than a general-purpose encoder at its default
    settings, for a few kilobytes more.
``FrameEncoder(compress_level=1, band_rows=16, split=True, deflate="auto")``
    ``.encode(rgba) -> bytes`` for a stream of frames of one size, written with the frame's
    channels as they are (an RGBA frame as an RGBA PNG: copying the rows whole is 15x faster
    than dropping every fourth byte, which costs more than the alpha channel's compression,
    a constant 255 in the opaque figures). The image data is cut into bands of ``band_rows``
    rows, each compressed on its own (a raw deflate segment ended by a sync flush, so the
    segments join into one valid stream); a band whose pixels equal the previous frame's keeps
    its compressed bytes. A control that moves one plot re-encodes the rows that plot spans,
    not the whole figure. ``.prepare(rgba, rows)`` compresses the changed bands outside
    ``rows`` ahead (while the plots in those rows wait for data). ``.bands_encoded`` counts
    the bands compressed (tests, benchmarks). With ``split`` (the default), :meth:`encode`
    compresses half of many changed bands on a second thread (zlib runs without Python's
    lock), where the machine has two or more CPUs and the compressor is zlib (ISA-L's was
    measured faster alone than with the hand-off); the bytes are the same either way.
    ``deflate``: the compressor, ``"zlib"`` (Python's own) or ``"isal"`` (ISA-L's deflate, from
    the ``isal`` package); ``"auto"`` takes ISA-L where it is installed and the level is one
    of its levels 1 to 3, else zlib (at level 1 the explorer's whole 720x600 frame encodes in
    1.7 ms against zlib's 3.4 ms, 78 kB against 82 kB: ``benchmarks/bench_explorer.py``).
    Either writes a standard deflate stream that any PNG decoder reads.

>>> import numpy as np
>>> enc = FrameEncoder()
>>> frame = np.full((40, 30, 4), 255, np.uint8)
>>> a = enc.encode(frame); frame[35, 3] = (0, 0, 0, 255); b = enc.encode(frame)
>>> a[:4] == b"\\x89PNG", enc.bands_encoded  # 3 bands, then only the last one again
(True, 4)
"""

from __future__ import annotations

import os
import struct
import zlib
from concurrent.futures import ThreadPoolExecutor

import numpy as np

try:  # ISA-L's deflate: the same format, compressed several times faster at low levels
    from isal import isal_zlib
except ImportError:  # (where its wheels are not built, zlib does the work)
    isal_zlib = None

__all__ = ["FrameEncoder", "encode_png"]

DEFLATES = ("auto", "zlib", "isal")

_SIGNATURE = b"\x89PNG\r\n\x1a\n"

_FINAL_BLOCK = b"\x03\x00"  # an empty final deflate block (fixed Huffman, end of block)


def _check(arr: np.ndarray, compress_level: int) -> None:
    if arr.ndim != 3 or arr.shape[2] not in (3, 4) or arr.dtype != np.uint8:
        raise ValueError(f"rgba must be an (H, W, 3 or 4) uint8 array, got {arr.shape} {arr.dtype}")
    if not 0 <= int(compress_level) <= 9:
        raise ValueError(f"compress_level must be in 0..9, got {compress_level}")


def _rows(arr: np.ndarray, out: np.ndarray | None = None, keep_alpha: bool = False) -> np.ndarray:
    """PNG scanlines ``(H, 1 + 3 W)``: filter byte 0 ("none"), then the RGB bytes (with
    ``keep_alpha``, ``(H, 1 + 4 W)``: the RGBA bytes of an RGBA frame)."""
    h, w, c = arr.shape
    if out is None:
        out = np.empty((h, 1 + (c if keep_alpha else 3) * w), np.uint8)
    out[:, 0] = 0
    if c == 3 or keep_alpha:
        out[:, 1:] = arr.reshape(h, c * w)
    else:  # a gather with a fixed index: faster than numpy's strided copy of [..., :3]
        out[:, 1:] = arr.reshape(h, 4 * w).take(_rgb_index(w), axis=1)
    return out


_INDEX: dict = {}


def _rgb_index(w: int) -> np.ndarray:
    idx = _INDEX.get(w)
    if idx is None:
        idx = _INDEX[w] = (np.arange(w)[:, None] * 4 + np.arange(3)).reshape(-1).astype(np.intp)
    return idx


def _chunk(tag: bytes, data: bytes) -> bytes:
    crc = zlib.crc32(data, zlib.crc32(tag)) & 0xFFFFFFFF
    return struct.pack(">I", len(data)) + tag + data + struct.pack(">I", crc)


def _png(w: int, h: int, idat: bytes, alpha: bool = False) -> bytes:
    header = struct.pack(">IIBBBBB", w, h, 8, 6 if alpha else 2, 0, 0, 0)  # 8-bit RGB(A), no interlace
    return b"".join((_SIGNATURE, _chunk(b"IHDR", header), _chunk(b"IDAT", idat), _chunk(b"IEND", b"")))


def encode_png(rgba: np.ndarray, compress_level: int = 1) -> bytes:
    """PNG bytes of an ``(H, W, 4)`` (or ``(H, W, 3)``) uint8 buffer (alpha dropped).

    >>> encode_png(np.zeros((2, 3, 4), np.uint8))[:4] == b"\\x89PNG"
    True
    """
    arr = np.asarray(rgba)
    _check(arr, compress_level)
    h, w = arr.shape[:2]
    return _png(w, h, zlib.compress(_rows(arr).tobytes(), int(compress_level)))


def adler32_combine(adler1: int, adler2: int, len2: int) -> int:
    """The Adler-32 of two byte strings joined, from theirs and the second one's length
    (zlib's ``adler32_combine``, which Python's zlib module does not offer).

    >>> a, b = b"kept bands ", b"and a new one"
    >>> adler32_combine(zlib.adler32(a), zlib.adler32(b), len(b)) == zlib.adler32(a + b)
    True
    """
    base = 65521
    rem = len2 % base
    sum1 = adler1 & 0xFFFF
    sum2 = (rem * sum1) % base
    sum1 = (sum1 + (adler2 & 0xFFFF) + base - 1) % base
    sum2 = (sum2 + ((adler1 >> 16) & 0xFFFF) + ((adler2 >> 16) & 0xFFFF) + base - rem) % base
    return sum1 | (sum2 << 16)


class FrameEncoder:
    """PNG frames of one size, re-compressing only the bands of rows that changed."""

    SPLIT_BANDS = 8  # encode() hands half the changed bands to a second thread from this many

    def __init__(self, compress_level: int = 1, band_rows: int = 16, split: bool = True,
                 deflate: str = "auto"):
        if not 0 <= int(compress_level) <= 9:
            raise ValueError(f"compress_level must be in 0..9, got {compress_level}")
        if int(band_rows) < 1:
            raise ValueError(f"band_rows must be >= 1, got {band_rows}")
        if deflate not in DEFLATES:
            raise ValueError(f"deflate must be one of {DEFLATES}, got {deflate!r}")
        self.level, self.band_rows = int(compress_level), int(band_rows)
        isal_level = 1 <= self.level <= 3
        if deflate == "isal" and (isal_zlib is None or not isal_level):
            why = "the isal package is not installed" if isal_zlib is None else f"compress_level is {self.level}"
            raise ValueError(f"deflate='isal' needs the isal package and a compress_level of 1 to 3; {why}")
        use_isal = deflate == "isal" or (deflate == "auto" and isal_zlib is not None and isal_level)
        self._zlib = isal_zlib if use_isal else zlib
        self.deflate = "isal" if use_isal else "zlib"
        # ISA-L compresses a band in less time than handing it to another thread costs
        self.split = bool(split) and (os.cpu_count() or 1) > 1 and not use_isal
        self._last = None  # the previous frame's pixels
        self._rows = None  # its scanlines
        self._bands: list = []  # compressed bytes per band
        self._adlers: list = []  # Adler-32 of each band's scanlines
        self.bands_encoded = 0

    def encode(self, rgba: np.ndarray) -> bytes:
        arr = np.asarray(rgba)
        self._compress(arr, None, split=self.split)
        h, w, c = arr.shape
        b = self.band_rows
        adler = 1
        for i, a in enumerate(self._adlers):
            adler = adler32_combine(adler, a, (min(h, (i + 1) * b) - i * b) * (1 + c * w))
        idat = b"".join((b"\x78\x01", *self._bands, _FINAL_BLOCK, struct.pack(">I", adler)))
        return _png(w, h, idat, alpha=c == 4)

    def prepare(self, rgba: np.ndarray, rows: tuple) -> None:
        """Compress now the changed bands that lie wholly outside ``rows = (first, end)``
        (whose pixels are final): the next :meth:`encode` of a frame that differs from
        ``rgba`` only inside those rows compresses just the bands they touch."""
        self._compress(np.asarray(rgba), rows)

    def _compress(self, arr: np.ndarray, skip: tuple | None, split: bool = False) -> None:
        _check(arr, self.level)
        h, w, c = arr.shape
        b = self.band_rows
        n = -(-h // b)
        if self._last is None or self._last.shape != arr.shape:
            # zeros, not empty: a band a first prepare() skipped is compared with these pixels
            # by the next encode (uninitialised memory may hold this very frame: a band left
            # unencoded)
            self._last = np.zeros_like(arr)
            self._rows = np.empty((h, 1 + c * w), np.uint8)
            self._bands = [None] * n
            self._adlers = [1] * n
            changed = np.ones(n, bool)
        else:  # and every band never encoded (one a first prepare() skipped)
            changed = self._changed_bands(arr, n) | np.array([x is None for x in self._bands])
        if skip is not None:  # bands that reach into the rows still to be drawn wait
            first, end = skip
            starts = np.arange(n) * b
            changed &= (starts + b <= first) | (starts >= end)
        todo = np.flatnonzero(changed).tolist()
        if split and len(todo) >= self.SPLIT_BANDS:
            # the later half on the second thread, the first here: each band writes only its
            # own rows and list slots
            half = len(todo) // 2
            other = _helper().submit(self._compress_bands, arr, todo[half:])
            try:
                self._compress_bands(arr, todo[:half])
            finally:
                other.result()
        else:
            self._compress_bands(arr, todo)
        self.bands_encoded += len(todo)

    def _compress_bands(self, arr: np.ndarray, bands: list) -> None:
        h, b, z = arr.shape[0], self.band_rows, self._zlib
        for i in bands:
            r0, r1 = i * b, min(h, (i + 1) * b)
            self._last[r0:r1] = arr[r0:r1]
            rows = _rows(arr[r0:r1], self._rows[r0:r1], keep_alpha=True)
            c = z.compressobj(self.level, z.DEFLATED, -15)
            self._bands[i] = c.compress(rows.data) + c.flush(z.Z_SYNC_FLUSH)
            self._adlers[i] = z.adler32(rows.data)

    def _changed_bands(self, arr: np.ndarray, n: int) -> np.ndarray:
        h = arr.shape[0]
        b = self.band_rows
        flat_new = arr.reshape(h, -1)
        flat_old = self._last.reshape(h, -1)
        if flat_new.shape[1] % 8 == 0 and flat_new.flags.c_contiguous:
            flat_new, flat_old = flat_new.view(np.uint64), flat_old.view(np.uint64)
        rows = (flat_new != flat_old).any(axis=1)
        pad = np.zeros(n * b, bool)
        pad[:h] = rows
        return pad.reshape(n, b).any(axis=1)


_HELPER: list = []  # one thread for every encoder's second half (renders run one at a time)


def _helper() -> ThreadPoolExecutor:
    if not _HELPER:
        _HELPER.append(ThreadPoolExecutor(1, thread_name_prefix="qwidgets-png"))
    return _HELPER[0]
