"""How a note version's Bundle and its entries' roles are kept in a row.

The Bundle is stored as its JSON compressed with zstd (level 1: about 50 us for a typical
Bundle, a fifth of the size). It is the largest part of a row, so compressing it cuts the
pages each write touches and each read brings back. The bytes stay JSON once decompressed,
so a read serves them without parsing.
"""

from __future__ import annotations

import threading

import zstandard

# Level 1: nearly the ratio of higher levels on this repetitive JSON at a third of the cost.
_LEVEL = 1


class _Contexts(threading.local):
    """A compressor and a decompressor per thread: zstd contexts may not be shared between
    threads, and making new ones for every call costs a tenth of the work."""

    def __init__(self) -> None:
        self.compressor = zstandard.ZstdCompressor(level=_LEVEL)
        self.decompressor = zstandard.ZstdDecompressor()


_contexts = _Contexts()


def pack_bundle(bundle_json: bytes) -> bytes:
    """The stored form of a Bundle's JSON."""
    return _contexts.compressor.compress(bundle_json)


def unpack_bundle(stored: bytes) -> bytes:
    """A Bundle's JSON from its stored form."""
    return _contexts.decompressor.decompress(stored)


def pack_roles(kinds: list[str], roles: tuple[str, ...]) -> str:
    """Each entry's resource type and role, in entry order, as stored: ``Procedure/procedure
    Observation/iop-before ...`` (types and roles never hold a space or a slash)."""
    return " ".join(f"{kind}/{role}" for kind, role in zip(kinds, roles, strict=True))


def unpack_roles(stored: str) -> tuple[tuple[str, str], ...]:
    """(resource type, role) of each entry, in entry order, from their stored form."""
    return tuple((kind, role) for kind, _, role in (p.partition("/") for p in stored.split()))
