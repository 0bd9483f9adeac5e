"""Bounded reading of HDF5 nodes, shared by the ``.h5`` reader and the MATLAB v7.3 reader.

Nothing is read before the declaration is checked: a dataset's shape and element size
against the ceilings of :mod:`features.io._bounds`, its storage (no external raw files,
no virtual datasets, no external links: a capture reads only its own file), its filters
(deflate, shuffle, Fletcher-32, n-bit, scale-offset) and, for deflated chunks, the size each
chunk inflates to (inflated here in bounded pieces first: the HDF5 library would grow its
buffer until a compression bomb ends). Attributes are counted and sized before they are read.
Every HDF5 failure of a damaged file becomes one :class:`CorruptFileError` naming the file.
"""
from __future__ import annotations

import math
import zlib
from contextlib import contextmanager
from typing import Any, Iterator

import h5py
import numpy as np

from waneguide.core.errors import WaneguideError
from waneguide.features.io import _bounds
from waneguide.features.io.errors import CaptureTooLargeError, CorruptFileError, EmptyDataError

__all__ = ["H5_ERRORS", "open_h5", "h5_guard", "checked_dataset", "read_dataset", "read_attrs"]

#: What h5py raises on a damaged file (the HDF5 library's errors arrive as these).
H5_ERRORS = (OSError, KeyError, RuntimeError, ValueError, TypeError, IndexError, AttributeError, UnicodeError,
             OverflowError, zlib.error)
_DEFLATE, _SHUFFLE, _FLETCHER32, _NBIT, _SCALEOFFSET = (h5py.h5z.FILTER_DEFLATE, h5py.h5z.FILTER_SHUFFLE,
                                                        h5py.h5z.FILTER_FLETCHER32, h5py.h5z.FILTER_NBIT,
                                                        h5py.h5z.FILTER_SCALEOFFSET)
_FILTERS = {_DEFLATE: "deflate", _SHUFFLE: "shuffle", _FLETCHER32: "fletcher32", _NBIT: "nbit",
            _SCALEOFFSET: "scaleoffset"}
#: Chunks of one dataset: a 4 Mi-sample record in chunks of 64 samples or more (h5py's own
#: chunking of such a record gives a few hundred chunks).
MAX_CHUNKS = 2**16


def open_h5(path, where: str, kind: str, accepted: str) -> h5py.File:
    """``h5py.File(path, "r")``, or a :class:`CorruptFileError` saying ``kind`` is unreadable and what is accepted."""
    try:
        return h5py.File(path, "r")
    except H5_ERRORS as exc:
        raise CorruptFileError(f"{where}: not a readable {kind} ({exc}); accepted: {accepted}") from None


@contextmanager
def h5_guard(where: str, what: str) -> Iterator[None]:
    """Turn h5py/HDF5 failures inside the block into one CorruptFileError naming ``where``."""
    try:
        yield
    except WaneguideError:
        raise
    except MemoryError:
        raise CaptureTooLargeError(
            f"{where}: the {what} declares more memory than can be given; nothing was kept. Write the capture "
            "again (one record per file)."
        ) from None
    except H5_ERRORS as exc:
        raise CorruptFileError(
            f"{where}: not a readable {what} ({type(exc).__name__}: {str(exc)[:200]}); write the capture again, "
            "or export it as .csv, .mat or .npz."
        ) from None


def checked_dataset(parent: h5py.Group, name: str, where: str) -> h5py.Dataset | None:
    """The dataset ``name`` of ``parent`` (None if absent or not a dataset), refused if it reads another file."""
    link = parent.get(name, getlink=True)
    if link is None:
        return None
    if isinstance(link, h5py.ExternalLink):
        raise CorruptFileError(
            f"{where}: {name!r} is a link to another file ({link.filename!r}); a capture reads only its own "
            "file. Copy the data into the capture file."
        )
    node = parent.get(name)
    if not isinstance(node, h5py.Dataset):
        return None
    plist = node.id.get_create_plist()
    if node.is_virtual or plist.get_external_count() > 0:
        raise CorruptFileError(
            f"{where}: dataset {name!r} keeps its data in other files (external or virtual storage); a capture "
            "reads only its own file. Copy the data into the capture file."
        )
    return node


def _inflates_within(data: bytes, limit: int) -> bool:
    """True if the zlib stream ``data`` inflates to at most ``limit`` bytes (inflated 1 MiB at a time)."""
    d = zlib.decompressobj()
    total = 0
    tail = data
    while not d.eof:
        out = d.decompress(tail, 2**20)
        total += len(out)
        if total > limit:
            return False
        tail = d.unconsumed_tail
        if not out and not tail:
            break
    return True


def _check_chunks(ds: h5py.Dataset, name: str, where: str) -> None:
    plist = ds.id.get_create_plist()
    filters = [plist.get_filter(i)[0] for i in range(plist.get_nfilters())]
    unknown = [f for f in filters if f not in _FILTERS]
    if unknown:
        raise CorruptFileError(
            f"{where}: dataset {name!r} uses HDF5 filter(s) {unknown}; accepted: {', '.join(_FILTERS.values())}. "
            "Write it uncompressed or with gzip."
        )
    if _DEFLATE not in filters or ds.chunks is None:
        return
    n_chunks = ds.id.get_num_chunks()
    if n_chunks > MAX_CHUNKS:
        raise CaptureTooLargeError(
            f"{where}: dataset {name!r} is stored in {n_chunks:,} chunks, above the ceiling of {MAX_CHUNKS:,}; "
            "write it with larger chunks (or h5py's default chunking)."
        )
    chunk_bytes = math.prod(ds.chunks) * ds.dtype.itemsize
    bit = 1 << filters.index(_DEFLATE)
    for i in range(n_chunks):
        info = ds.id.get_chunk_info(i)
        mask, raw = ds.id.read_direct_chunk(info.chunk_offset)
        if not mask & bit and not _inflates_within(raw, chunk_bytes):
            raise CaptureTooLargeError(
                f"{where}: chunk {i} of dataset {name!r} inflates past its declared {chunk_bytes:,} bytes (a "
                "compression bomb or a damaged file); nothing was read. Write the capture again."
            )


def read_dataset(ds: h5py.Dataset, name: str, where: str, *, samples: bool) -> np.ndarray:
    """Read ``ds`` after checking its declaration: samples (``samples=True``) or a metadata value."""
    if ds.shape is None:
        raise EmptyDataError(f"{where}: dataset {name!r} is empty (no dataspace); store the values in it.")
    itemsize = ds.dtype.itemsize
    if samples:
        if ds.dtype.kind not in "iufb":
            raise EmptyDataError(
                f"{where}: {name} must be numeric (integers or floats); got HDF5 type {ds.dtype}. "
                "Store the samples as numbers."
            )
        _bounds.check_samples(where, name, ds.shape, itemsize)
    else:
        _bounds.check_metadata_size(where, name, math.prod(ds.shape))
        if itemsize > 4 * _bounds.MAX_METADATA_CHARS:
            _bounds.check_metadata_size(where, name, itemsize)
    _check_chunks(ds, name, where)
    return ds[()]


def read_attrs(obj: h5py.HLObject, where: str) -> dict[str, Any]:
    """Attributes of ``obj`` (text decoded), each sized before it is read."""
    _bounds.check_metadata_count(where, len(obj.attrs))
    out: dict[str, Any] = {}
    for key in obj.attrs.keys():
        aid = h5py.h5a.open(obj.id, key.encode())
        shape = aid.shape if aid.shape is not None else ()
        _bounds.check_metadata_size(where, key, max(math.prod(shape), aid.dtype.itemsize // 4))
        value = obj.attrs[key]
        out[key] = value.decode("utf-8") if isinstance(value, bytes) else value
    return out
