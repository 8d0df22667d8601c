"""The system's libdeflate through ``ctypes``: one deflated ``.npz`` member inflated in
one call, and gzip streams of a page's array buffers.

Reading an utterance's arrays is most of what a corpus scan spends per utterance, and
most of that is inflating the compressed ``.npz`` member. libdeflate (a C library most
Linux systems ship, e.g. Debian's ``libdeflate0``) inflates a whole buffer about twice
as fast as zlib's streaming decompressor that ``zipfile`` uses. It is used through
``ctypes`` when the loader finds it; without it :func:`read_member` returns None and the
caller reads the member with ``zipfile`` as before. Either way the bytes are checked
against the archive's CRC-32 and never exceed the size the archive states.

A page's document carries its arrays as gzip streams (bokeh writes them with zlib at
its compression level); libdeflate's whole-buffer compressor at the same level takes
about half zlib's time. The stream is standard gzip (RFC 1952): its bytes differ from
zlib's, what it inflates to does not. Without libdeflate :func:`gzip_compress` returns
None and the caller compresses as bokeh does.
"""

from __future__ import annotations

import ctypes
import ctypes.util
import struct
import threading
import zipfile
import zlib

import numpy as np

_LOCK = threading.Lock()
_STATE: dict = {}


def _library():
    """The loaded libdeflate with its signatures declared, or None (looked up once)."""
    with _LOCK:
        if "lib" not in _STATE:
            _STATE["lib"] = _load()
        return _STATE["lib"]


def _load():
    name = ctypes.util.find_library("deflate")
    if not name:
        return None
    try:
        lib = ctypes.CDLL(name)
        lib.libdeflate_alloc_decompressor.argtypes = []
        lib.libdeflate_alloc_decompressor.restype = ctypes.c_void_p
        lib.libdeflate_free_decompressor.argtypes = [ctypes.c_void_p]
        lib.libdeflate_free_decompressor.restype = None
        lib.libdeflate_deflate_decompress.argtypes = [
            ctypes.c_void_p,
            ctypes.c_char_p,
            ctypes.c_size_t,
            ctypes.c_void_p,
            ctypes.c_size_t,
            ctypes.POINTER(ctypes.c_size_t),
        ]
        lib.libdeflate_deflate_decompress.restype = ctypes.c_int
        _declare_compressor(lib)
    except (OSError, AttributeError):  # not the library we know
        return None
    return lib


def _declare_compressor(lib) -> None:
    """Declare the signatures of libdeflate's gzip compressor (libdeflate.h)."""
    lib.libdeflate_alloc_compressor.argtypes = [ctypes.c_int]
    lib.libdeflate_alloc_compressor.restype = ctypes.c_void_p
    lib.libdeflate_free_compressor.argtypes = [ctypes.c_void_p]
    lib.libdeflate_free_compressor.restype = None
    lib.libdeflate_gzip_compress_bound.argtypes = [ctypes.c_void_p, ctypes.c_size_t]
    lib.libdeflate_gzip_compress_bound.restype = ctypes.c_size_t
    lib.libdeflate_gzip_compress.argtypes = [
        ctypes.c_void_p,
        ctypes.c_void_p,
        ctypes.c_size_t,
        ctypes.c_void_p,
        ctypes.c_size_t,
    ]
    lib.libdeflate_gzip_compress.restype = ctypes.c_size_t


def gzip_compress(data, level: int) -> memoryview | None:
    """``data`` (any bytes-like object) as one gzip stream compressed at
    ``level`` (0-9, zlib's meaning), or None when libdeflate is not there.

    Examples
    --------
    >>> import gzip
    >>> z = gzip_compress(b"tram depot " * 100, 2)
    >>> z is None or gzip.decompress(z) == b"tram depot " * 100
    True
    """
    lib = _library()
    if lib is None:
        return None
    src = memoryview(data)
    if not src.c_contiguous:
        src = memoryview(src.tobytes())
    # the bytes as numpy sees them: their address without a copy, read-only or not
    inp = np.frombuffer(src.cast("B") if src.ndim != 1 or src.format != "B" else src, np.uint8)
    # a compressor takes microseconds to allocate: one per call keeps threads apart
    comp = lib.libdeflate_alloc_compressor(int(level))
    if not comp:
        raise MemoryError(f"libdeflate could not allocate a compressor of level {level}")
    try:
        out = np.empty(lib.libdeflate_gzip_compress_bound(comp, inp.size), np.uint8)
        size = lib.libdeflate_gzip_compress(
            comp, inp.ctypes.data, inp.size, out.ctypes.data, out.size
        )
    finally:
        lib.libdeflate_free_compressor(comp)
    if size == 0:  # cannot happen with the bound's room; never return a truncated stream
        raise RuntimeError("libdeflate could not compress into the room it asked for")
    return memoryview(out)[:size]


def read_member(f, info: zipfile.ZipInfo) -> bytearray | None:
    """The inflated bytes of member ``info`` of the open zip file ``f``.

    None when libdeflate is not there or the member is not a plain deflated one
    (stored, encrypted, empty): read it with ``zipfile`` then. Damaged data raises
    :class:`zipfile.BadZipFile` (or ``EOFError`` for a truncated file), as ``zipfile``
    would.
    """
    lib = _library()
    plain = info.compress_type == zipfile.ZIP_DEFLATED and not info.flag_bits & 0x1
    if lib is None or not plain or info.file_size == 0:
        return None
    f.seek(info.header_offset)
    head = f.read(30)
    if len(head) != 30 or head[:4] != b"PK\x03\x04":
        raise zipfile.BadZipFile(f"member {info.filename!r}: bad local file header")
    name_len, extra_len = struct.unpack("<HH", head[26:30])
    f.seek(info.header_offset + 30 + name_len + extra_len)
    packed = f.read(info.compress_size)
    if len(packed) != info.compress_size:
        raise EOFError(f"member {info.filename!r}: file ends inside it")
    # never more than the archive states: a damaged stream cannot make us allocate more
    out = bytearray(info.file_size)
    got = ctypes.c_size_t(0)
    dec = lib.libdeflate_alloc_decompressor()
    if not dec:
        raise MemoryError("libdeflate could not allocate a decompressor")
    try:
        buf = (ctypes.c_char * len(out)).from_buffer(out)
        rc = lib.libdeflate_deflate_decompress(
            dec, packed, len(packed), buf, len(out), ctypes.byref(got)
        )
        del buf  # release the export of ``out``
    finally:
        lib.libdeflate_free_decompressor(dec)
    if rc != 0 or got.value != info.file_size or zlib.crc32(out) != info.CRC:
        raise zipfile.BadZipFile(
            f"member {info.filename!r}: damaged compressed data (stream, size or CRC-32)"
        )
    return out
