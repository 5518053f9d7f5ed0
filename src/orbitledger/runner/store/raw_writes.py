"""Raw chunk writes: what one commit writes (whole sample chunks as plain files
where an array's chunks are its raw bytes, zarr for the rest), atomic file
writes, fsyncs folded into one journal commit, and zarr's event loop."""

import asyncio
import os
import threading
import uuid

import numpy as np

from orbitledger.runner import defaults
from orbitledger.runner.errors import StoreError
from orbitledger.runner.store.layout import _ck_attrs, _ck_dim

_POOL = None
_POOL_LOCK = threading.Lock()
# Write every chunk, even one equal to the fill value, so that each file a
# commit fsyncs exists.
_WRITE_ALL = {"write_empty_chunks": True}


def _in_pool(calls):
    """Run calls [(function, *args)] a few at a time; re-raise the first error.

    File writes and fsync release the GIL, so a few threads let the
    filesystem fold the flushes into one journal commit instead of one per
    file.
    """
    global _POOL
    if not calls:
        return
    with _POOL_LOCK:  # a worker's main thread and its helper may both write
        if _POOL is None:
            from concurrent.futures import ThreadPoolExecutor

            _POOL = ThreadPoolExecutor(max_workers=4, thread_name_prefix="store-io")
    for fut in [_POOL.submit(*call) for call in calls]:
        fut.result()


def _fsync_paths(files, dirs):
    """fsync the given files, then the given folders."""
    _in_pool([(_fsync_one, p) for p in sorted(set(files))])
    _in_pool([(_fsync_one, p) for p in sorted(set(dirs))])


def _fsync_one(path):
    fd = os.open(path, os.O_RDONLY)
    try:
        os.fsync(fd)
    finally:
        os.close(fd)


def _run(coro):
    """Run a coroutine on zarr's own event loop (one thread hop for a whole batch)."""
    from zarr.core.sync import sync

    return sync(coro)


async def _gather(coros):
    return await asyncio.gather(*coros)


def _raw_chunks(arr):
    """(chunk shape, dtype) when an array's chunks are its values' raw bytes, else None.

    That is the case for the store's own uncompressed arrays: a regular chunk
    grid, "/"-separated chunk keys and the bytes codec alone, little-endian.
    Such a chunk can be written as ``ndarray.tobytes()`` of the whole chunk,
    which spares zarr's general codec pipeline on every commit; any other
    array is written through zarr.
    """
    from zarr.codecs import BytesCodec
    from zarr.core.chunk_grids import RegularChunkGrid
    from zarr.core.chunk_key_encodings import DefaultChunkKeyEncoding

    m = arr.metadata
    codecs = getattr(m, "codecs", ())
    if (len(codecs) != 1 or not isinstance(codecs[0], BytesCodec)
            or not isinstance(getattr(m, "chunk_grid", None), RegularChunkGrid)
            or not isinstance(getattr(m, "chunk_key_encoding", None), DefaultChunkKeyEncoding)
            or m.chunk_key_encoding.separator != "/"):
        return None
    dtype = np.dtype(m.data_type.to_native_dtype())
    endian = codecs[0].endian
    if dtype.itemsize > 1 and (endian is None or endian.value != "little"):
        return None
    return tuple(m.chunk_grid.chunk_shape), dtype.newbyteorder("<")


def _put(path, data, durable):
    """Write bytes to a file atomically (temporary file, fsync, rename), as zarr does."""
    tmp = f"{path}.{uuid.uuid4().hex}.partial"
    try:
        try:
            fd = os.open(tmp, os.O_WRONLY | os.O_CREAT | os.O_TRUNC, 0o644)
        except FileNotFoundError:  # a new chunk's folder (a syscall spared on every other write)
            os.makedirs(os.path.dirname(path), exist_ok=True)
            fd = os.open(tmp, os.O_WRONLY | os.O_CREAT | os.O_TRUNC, 0o644)
        try:
            view = memoryview(data)
            while view:
                view = view[os.write(fd, view):]
            if durable:
                os.fsync(fd)
        finally:
            os.close(fd)
        os.replace(tmp, path)
    except BaseException:
        try:
            os.unlink(tmp)
        except FileNotFoundError:
            pass
        raise


def _chunk_now(h, key, path, shape, dtype, fill):
    """A sample chunk as it stands: cached from this store's last write, or read back.

    The cache lives in the handles of one fencing token (see
    :meth:`Store._handles`): while a claim's token is current no other worker
    can commit to the job, so the chunk this process last wrote under that
    token is exactly what the disk holds. A new token starts from the disk.
    """
    cached = h["tail"].get(key)
    if cached is not None and cached[0] == path:
        return cached[1]
    try:
        with open(path, "rb") as fh:
            data = fh.read()
    except FileNotFoundError:
        return np.full(shape, fill, dtype=dtype)
    if len(data) != int(np.prod(shape)) * dtype.itemsize:
        raise StoreError(f"sample chunk {path} has {len(data)} bytes, not the "
                         f"{int(np.prod(shape)) * dtype.itemsize} its shape needs; "
                         "the store is damaged.")
    return np.frombuffer(data, dtype=dtype).reshape(shape).copy()


def _plan(h, base, samples, ck):
    """Everything one commit writes.

    Returns (puts, grow, coros, files, dirs): whole raw chunks to write
    directly as (path, bytes); zarr coroutines that grow the arrays (run
    first); zarr coroutines for the rest (arrays that are not raw, a
    checkpoint that was not prepared); the files the coroutines write; and
    the folders to fsync afterwards.
    """
    puts, grow, coros, files, dirs = [], [], [], [], []
    if samples is not None:
        start, block = samples
        n = len(block["time"])
        need = start + n
        arrs = h["samples"]
        if arrs["time"].shape[0] < need:
            cap = max(need, 2 * arrs["time"].shape[0], defaults.SAMPLE_CHUNK)
            grow += [a.resize((cap,) + tuple(a.shape[1:])) for a in arrs.values()]
            files += [str(base / "samples" / k / "zarr.json") for k in arrs]
            dirs += [str(base / "samples" / k) for k in arrs]
        for key, a in arrs.items() if n else ():
            raw = h["raw"][key]
            if raw is None:
                coros.append(a.setitem(slice(start, need), np.ascontiguousarray(block[key])))
            rows = a.chunks[0]
            for c in range(start // rows, (need - 1) // rows + 1):
                rel = a.metadata.encode_chunk_key((c,) + (0,) * (a.ndim - 1))
                path = str(base / "samples" / key / rel)
                if raw is None:
                    files.append(path)
                else:
                    # Whole chunk = the rows already there + this block's rows.
                    shape, dtype = raw
                    lo, hi = max(start, c * rows), min(need, (c + 1) * rows)
                    if hi - lo == rows:
                        chunk = np.empty(shape, dtype=dtype)  # all of it is new
                    else:
                        chunk = _chunk_now(h, key, path, shape, dtype, a.metadata.fill_value)
                    chunk[lo - c * rows:hi - c * rows] = block[key][lo - start:hi - start]
                    h["tail"][key] = (path, chunk)
                    puts.append((path, chunk.tobytes()))
                d = os.path.dirname(path)
                while d != str(base / "samples" / key):
                    dirs.append(d)
                    d = os.path.dirname(d)
    if ck is not None:
        name, blob, layout, _digest = ck
        d = base / "checkpoints" / name
        ready = h["ready"].pop(name, None)
        if ready is not None and ready == (blob.nbytes, layout):
            puts.append((str(d / "c" / "0"), blob.tobytes()))
        else:
            coros.append(h["checkpoints"].create_array(
                name, data=blob, chunks=blob.shape, compressors=None, overwrite=True,
                dimension_names=[_ck_dim(name)], attributes=_ck_attrs(layout),
                config=_WRITE_ALL))
            files.append(str(d / "c" / "0"))
        files.append(str(d / "zarr.json"))  # written by prepare() or just now
        dirs += [str(d / "c"), str(d), str(base / "checkpoints")]
    return puts, grow, coros, files, dirs


def _fits(first, block):
    """Whether a first block of samples fits the first chunk of each array."""
    return all(len(block[name]) <= shape[0]
               for name, (_, shape, _, _) in first["samples"].items())
