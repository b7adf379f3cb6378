"""msgpack written by hand, byte for byte what ``msgpack.packb(..., use_bin_type=True)``
writes: the headers of arrays, maps and strings, and a value as pieces whose large bytes
values are not copied (a snapshot fed to zstd; the commit's column packs)."""

from __future__ import annotations

from typing import Any

import msgpack


def array_head(n: int) -> bytes:
    """The header of an array of ``n`` elements."""
    return _head(n, 0x90, b"\xdc", b"\xdd")


def map_head(n: int) -> bytes:
    """The header of a map of ``n`` pairs."""
    return _head(n, 0x80, b"\xde", b"\xdf")


def _head(n: int, fix: int, h16: bytes, h32: bytes) -> bytes:
    if n < 16:
        return bytes((fix | n,))
    return h16 + n.to_bytes(2, "big") if n < 1 << 16 else h32 + n.to_bytes(4, "big")


def str_head(size: int) -> bytes:
    """The header of a str of ``size`` bytes (str8 included, as use_bin_type=True)."""
    if size < 32:
        return bytes([0xA0 | size])
    if size < 1 << 8:
        return b"\xd9" + bytes([size])
    if size < 1 << 16:
        return b"\xda" + size.to_bytes(2, "big")
    return b"\xdb" + size.to_bytes(4, "big")


BIG_PIECE = 1 << 16  # bytes values from this size on are pieces of their own


def msgpack_pieces(obj: Any) -> list[bytes]:
    """``msgpack.packb(obj, use_bin_type=True)`` as pieces whose concatenation is exactly
    those bytes; bytes values of ``BIG_PIECE`` or more are pieces of their own (not
    copied). Maps and lists are walked; anything else is packed by msgpack."""
    pieces: list[bytes] = []
    head = bytearray()

    def walk(x: Any) -> None:
        nonlocal head
        if isinstance(x, dict):
            head += map_head(len(x))
            for k, v in x.items():
                walk(k)
                walk(v)
        elif isinstance(x, list | tuple):
            head += array_head(len(x))
            for v in x:
                walk(v)
        elif isinstance(x, bytes) and len(x) >= BIG_PIECE:
            head += b"\xc6" + len(x).to_bytes(4, "big")  # bin32
            pieces.append(bytes(head))
            pieces.append(x)
            head = bytearray()
        else:
            head += msgpack.packb(x, use_bin_type=True)

    walk(obj)
    pieces.append(bytes(head))
    return pieces
