"""The checkpoint store: one Zarr group per job.

Layout of ``store/job-00000042/``::

    checkpoints/00000007-3         exact integrator state of checkpoint 7, written
                                   under fencing token 3 (never rewritten): one
                                   uint8 array holding every state array's raw
                                   bytes; its attribute "layout" lists each
                                   array's key, dtype, shape and byte offset
                                   (the state's SHA-256 is in the ledger)
    samples/time, step, energy_error, angmom_error   (sample,)
    samples/elements                                 (sample, body, element)

The database says how many checkpoints and samples are committed; samples
beyond that count are ignored and overwritten on resume. Checkpoint groups
carry the fencing token in their name so a worker whose lease was taken over
can never overwrite the state another worker committed.
"""

import asyncio
import hashlib
import json
import os
import shutil
import threading
import uuid
from collections import OrderedDict
from pathlib import Path

import numpy as np

from orbitledger.runner import defaults
from orbitledger.runner.errors import StoreError
from orbitledger.runner.execution.failpoints import failpoint
from orbitledger.runner.store.chain import chain_sha256  # noqa: F401 - part of the store's API

# The Julian year in days (as integrators.constants.YEAR_D; not imported from
# there, so reading a store does not load the numerical core).
YEAR_D = 365.25
ELEMENT_NAMES = ["a", "e", "i", "node", "peri", "mean_anomaly"]
ELEMENT_UNITS = ["au", "1", "deg", "deg", "deg", "deg"]
# CF-style attributes, so that xarray opens a job's samples as a self-describing
# Dataset: time and step are coordinates of every series, body and element
# are labelled dimensions.
_ATTRS = {
    "time": {"units": "day", "long_name": "time since the start of the integration"},
    "time_yr": {"units": "yr", "long_name": "time since the start of the integration "
                                            "(Julian years of 365.25 d)"},
    "step": {"long_name": "step number"},
    "energy_error": {"units": "1", "long_name": "relative energy error (E - E0) / |E0|",
                     "coordinates": "time time_yr step"},
    "angmom_error": {"units": "1",
                     "long_name": "relative angular-momentum error |L - L0| / |L0|",
                     "coordinates": "time time_yr step"},
    "elements": {"long_name": "heliocentric osculating elements (units by element: "
                              "element_units)", "element_units": ELEMENT_UNITS,
                 "coordinates": "time time_yr step"},
}
# Series of jobs that carry a chaos indicator (`method.indicator`), only in their stores.
_INDICATOR_ATTRS = {
    "megno": {"units": "1", "long_name": "MEGNO <Y>, mean exponential growth factor of "
                                         "nearby orbits (2: quasi-periodic)",
              "coordinates": "time time_yr step"},
    "lyapunov": {"units": "1/day", "long_name": "finite-time largest Lyapunov exponent",
                 "coordinates": "time time_yr step"},
}
# Series of jobs with test particles (`[particles]`), only in their stores.
_PARTICLE_ATTRS = {
    "particle_elements": {"long_name": "heliocentric osculating elements of the test particles "
                                       "about the star (NaN once removed; units by element: "
                                       "element_units)", "element_units": ELEMENT_UNITS,
                          "coordinates": "time time_yr step"},
    "particles_left": {"units": "1", "long_name": "test particles still integrated",
                       "coordinates": "time time_yr step"},
}
# Sample arrays only some jobs have.
_OPTIONAL = tuple(_INDICATOR_ATTRS) + tuple(_PARTICLE_ATTRS)
_SERIES = {
    "time": ("f8", ["sample"]),
    "time_yr": ("f8", ["sample"]),
    "step": ("i8", ["sample"]),
    "energy_error": ("f8", ["sample"]),
    "angmom_error": ("f8", ["sample"]),
}


def _ck_dim(name):
    """A checkpoint's own dimension name, so the job group opens as an xarray DataTree."""
    return f"bytes_{name}"


def _ck_attrs(layout):
    return {"layout": layout,
            "long_name": "exact integrator state, packed bytes (arrays listed in layout)"}


def _job_dir_name(job_id):
    if isinstance(job_id, bool) or not isinstance(job_id, (int, np.integer)) or job_id < 1:
        # Job ids are positive integers, so a path can never escape the store.
        raise StoreError(f"job id must be a positive integer, got {job_id!r}.")
    return f"job-{int(job_id):08d}"


def to_storable(arrays):
    """State arrays as numeric arrays only (text arrays become UTF-8 JSON bytes)."""
    out = {}
    for key, val in arrays.items():
        val = np.asarray(val)
        if val.dtype.kind == "U":
            out[key] = np.frombuffer(json.dumps([str(s) for s in val]).encode("utf-8"),
                                     dtype=np.uint8).copy()
        else:
            out[key] = np.ascontiguousarray(val)
    return out


def from_storable(arrays):
    """Inverse of :func:`to_storable`."""
    out = dict(arrays)
    for key in list(out):
        # Text arrays: the bodies' names, and a nested method's (``inner_names``).
        if (key == "names" or key.endswith("_names")) and out[key].dtype == np.uint8:
            out[key] = np.array(json.loads(bytes(out[key]).decode("utf-8")), dtype=np.str_)
    return out


def _layout(storable):
    """[key, dtype, shape, byte offset, byte count] of each array, keys sorted."""
    layout, offset = [], 0
    for key in sorted(storable):
        arr = storable[key]
        layout.append([key, arr.dtype.str, list(arr.shape), offset, arr.nbytes])
        offset += arr.nbytes
    return layout


def state_layout(arrays):
    """The packed layout a checkpoint of these state arrays will have (see :meth:`Store.prepare`)."""
    return _layout(to_storable(arrays))


def _packed(arrays):
    """State arrays packed into one uint8 blob: (blob, layout, SHA-256 of the state)."""
    storable = to_storable(arrays)
    blob = b"".join(storable[key].tobytes() for key in sorted(storable))
    return np.frombuffer(blob, dtype=np.uint8), _layout(storable), state_sha256(storable)


def state_sha256(storable):
    """SHA-256 over keys, dtypes, shapes and bytes of storable arrays, keys sorted."""
    h = hashlib.sha256()
    for key in sorted(storable):
        arr = np.ascontiguousarray(storable[key])
        h.update(key.encode("utf-8") + b"\0" + arr.dtype.str.encode() + b"\0"
                 + repr(arr.shape).encode() + b"\0")
        h.update(arr.tobytes())
    return h.hexdigest()


# Arrays derived from others (time in years = time / 365.25): not hashed, so
# stores made before they existed keep their hashes; verify checks them instead.
DERIVED_SAMPLES = ("time_yr",)


def samples_sha256(block):
    """SHA-256 of one block of samples (dict of arrays, derived ones left out), keys sorted."""
    return state_sha256({k: v for k, v in block.items() if k not in DERIVED_SAMPLES})


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


def _ck_metadata(name, nbytes, layout):
    """The zarr.json of a checkpoint array (uint8, one chunk, no compressor), as the
    bytes zarr 3 writes for it (its json.dumps with indent 2, keys in its order)."""
    meta = {
        "shape": [nbytes],
        "data_type": "uint8",
        "chunk_grid": {"name": "regular", "configuration": {"chunk_shape": [nbytes]}},
        "chunk_key_encoding": {"name": "default", "configuration": {"separator": "/"}},
        "fill_value": 0,
        "codecs": [{"name": "bytes"}],
        "attributes": _ck_attrs(layout),
        "dimension_names": [_ck_dim(name)],
        "zarr_format": 3,
        "node_type": "array",
        "storage_transformers": [],
    }
    return json.dumps(meta, allow_nan=True, indent=2).encode()


def _metadata_bytes(base, names):
    """The bytes of every metadata file a job's writer opens (see Store._handles), or
    None if one cannot be read."""
    rels = ["zarr.json", "checkpoints/zarr.json", "samples/zarr.json"] + [
        f"samples/{k}/zarr.json" for k in names]
    out = []
    try:
        for rel in rels:
            with open(base / rel, "rb") as fh:
                out.append(fh.read())
    except OSError:
        return None
    return tuple(out)


def _raw_checkpoint(folder):
    """(bytes, layout) of a checkpoint array read as plain files, or None.

    Only an array exactly as :meth:`Store.prepare` and :meth:`Store.write_chunk`
    make it qualifies: Zarr v3, uint8, one regular chunk holding every byte,
    "/"-separated chunk keys, the bytes codec alone, and a chunk file of the
    full length. Then the chunk file *is* the packed state, and reading it
    spares importing zarr on the resume path. Anything else (another codec,
    a missing or short chunk, metadata that does not parse) returns None and
    is read through zarr, whose errors are reported as before.
    """
    try:
        with open(folder / "zarr.json", "rb") as fh:
            meta = json.loads(fh.read())
        n = meta["shape"][0]
        grid = meta["chunk_grid"]
        keys = meta["chunk_key_encoding"]
        ok = (meta.get("zarr_format") == 3 and meta.get("node_type") == "array"
              and meta["shape"] == [n] and isinstance(n, int) and n > 0
              and meta["data_type"] == "uint8"
              and grid == {"name": "regular", "configuration": {"chunk_shape": [n]}}
              and keys.get("name") == "default"
              and keys.get("configuration", {}).get("separator") == "/"
              and len(meta["codecs"]) == 1 and meta["codecs"][0].get("name") == "bytes"
              and not meta.get("storage_transformers"))
        layout = meta["attributes"]["layout"]
        if not ok or not isinstance(layout, list):
            return None
        with open(folder / "c" / "0", "rb") as fh:
            data = fh.read(n + 1)
    except (OSError, ValueError, KeyError, TypeError, AttributeError, IndexError):
        return None
    return (data, layout) if len(data) == n else None


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


def _template_key(body_names, capacity, indicator, particles):
    """What makes two new jobs' groups the same bytes: bodies, first size, optional arrays."""
    return (tuple(body_names), int(capacity), bool(indicator), tuple(particles))


def _new_folders(rels, existing):
    """Folders of the relative file paths `rels` not already made for the paths
    `existing`, parents first."""
    have = {d for rel in existing for d in _folders(rel)}
    new = {d for rel in rels for d in _folders(rel)} - have
    return sorted(new, key=lambda d: (d.count("/"), d))


def _write_new(base, dirs, files):
    """Make new folders (parents first) and write new files under base, in place:
    a folder just created has nothing to replace atomically."""
    for rel in dirs:
        os.mkdir(base / rel)
    for rel, data in files:
        with open(base / rel, "wb") as fh:
            fh.write(data)


def _fits(first, block):
    """Whether a first block of samples fits the first chunk of each array."""
    return all(len(block[name]) <= shape[0]
               for name, (_, shape, _, _) in first["samples"].items())


def _folders(rel):
    """The folders above a relative file path ("a/b/c" -> "a", "a/b")."""
    parts = rel.split("/")[:-1]
    return ["/".join(parts[:k]) for k in range(1, len(parts) + 1)]


def _damaged_metadata(path):
    """The first zarr.json under a job's folder that is not a readable JSON object, or None."""
    for root, dirs, names in os.walk(path):
        dirs.sort()
        if "zarr.json" in names:
            meta = os.path.join(root, "zarr.json")
            try:
                with open(meta, "rb") as fh:
                    if not isinstance(json.loads(fh.read()), dict):
                        return meta
            except (OSError, ValueError):
                return meta
    return None


def _store_error(job_id, path, what, err):
    """A StoreError for a failed open or read: names a damaged metadata file if there is one."""
    if isinstance(err, StoreError):
        return err
    meta = _damaged_metadata(path)
    if meta is not None:
        return StoreError(f"job {job_id}: the store's metadata file {meta} is damaged; "
                          "restore it from a backup, or run `orbitledger verify` to see what "
                          "else is affected.")
    return StoreError(f"job {job_id}: {what} could not be read ({type(err).__name__}: {err}).")


def _particle_rows(k):
    """Rows of one Zarr chunk of k particles' elements (about PARTICLE_CHUNK_BYTES)."""
    return max(1, min(defaults.SAMPLE_CHUNK, defaults.PARTICLE_CHUNK_BYTES // (48 * max(k, 1))))


async def _create_async(path, body_names, capacity, indicator=False, particles=()):
    """A job's groups, sample arrays and label arrays, created concurrently."""
    from zarr.api import asynchronous as za
    from zarr.storage import LocalStore

    g = await za.group(store=LocalStore(str(path)), overwrite=True, attributes={
        "body_names": body_names, "element_names": ELEMENT_NAMES,
        "units": {"time": "d", "a": "au", "angles": "deg"}})
    s, _ = await asyncio.gather(
        g.create_group("samples", attributes={"body_names": body_names[1:]}),
        g.create_group("checkpoints"))
    nb = len(body_names) - 1
    # Uncompressed: appends rewrite partly filled chunks, and float time series
    # compress poorly anyway.
    coros = [s.create_array(key, shape=(capacity,), dtype=dtype,
                            chunks=(defaults.SAMPLE_CHUNK,), dimension_names=dims,
                            compressors=None, fill_value=-1 if dtype == "i8" else np.nan,
                            attributes=_ATTRS[key]) for key, (dtype, dims) in _SERIES.items()]
    if indicator:
        coros += [s.create_array(key, shape=(capacity,), dtype="f8",
                                 chunks=(defaults.SAMPLE_CHUNK,), dimension_names=["sample"],
                                 compressors=None, fill_value=np.nan, attributes=attrs)
                  for key, attrs in _INDICATOR_ATTRS.items()]
    coros.append(s.create_array("elements", shape=(capacity, nb, 6), dtype="f8",
                                fill_value=np.nan, chunks=(defaults.SAMPLE_CHUNK, nb, 6),
                                dimension_names=["sample", "body", "element"],
                                compressors=None, attributes=_ATTRS["elements"]))
    # Labels of the body and element dimensions (written once, never resized).
    labels = {"body": body_names[1:], "element": ELEMENT_NAMES}
    if particles:
        k = len(particles)
        coros += [s.create_array("particle_elements", shape=(capacity, k, 6), dtype="f8",
                                 fill_value=np.nan, chunks=(_particle_rows(k), k, 6),
                                 dimension_names=["sample", "particle", "element"],
                                 compressors=None,
                                 attributes=_PARTICLE_ATTRS["particle_elements"]),
                  s.create_array("particles_left", shape=(capacity,), dtype="i8",
                                 fill_value=-1, chunks=(defaults.SAMPLE_CHUNK,),
                                 dimension_names=["sample"], compressors=None,
                                 attributes=_PARTICLE_ATTRS["particles_left"])]
        labels["particle"] = list(particles)
    coros += [s.create_array(key, shape=(len(v),), dtype=str, dimension_names=[key],
                             compressors=None) for key, v in labels.items()]
    arrays = await asyncio.gather(*coros)
    await asyncio.gather(*[a.setitem(slice(None), np.array(labels[k]))
                           for a, k in zip(arrays[-len(labels):], labels)])


class Store:
    """Zarr checkpoint store rooted at a folder.

    Parameters
    ----------
    root : str or Path
        The store folder (created if missing).
    """

    KEPT_JOBS = 64  # jobs whose opened arrays are kept (see _handles)

    def __init__(self, root):
        self.root = Path(root)
        self._open = OrderedDict()  # ("async", job id) -> opened arrays, least recent first
        self._lock = threading.Lock()  # a worker's main thread and helper share the store
        self._templates = {}  # (body names, first size) -> bytes of a fresh group
        self._made = {}  # job id -> its template key, from create_job until write_first
        self._firsts = {}  # (template key, checkpoint layout) -> how a first write lays out

    def job_path(self, job_id):
        """Folder of a job's Zarr group."""
        return self.root / _job_dir_name(job_id)

    def _group(self, job_id, mode="a"):
        path = self.job_path(job_id)
        if mode == "r" and not path.exists():
            raise StoreError(f"job {job_id} has no Zarr group at {path}.")
        if mode == "r":
            import zarr  # here, so the ledger's status commands never load it

            try:
                return zarr.open_group(str(path), mode="r")
            except Exception as err:  # noqa: BLE001 - zarr raises many types on bad metadata
                raise _store_error(job_id, path, "the job's group", err) from None
        # Writers reuse their handle: opening a group re-reads its metadata.
        key = int(job_id)
        with self._lock:
            g = self._open.get(key)
        if g is None:
            import zarr

            g = zarr.open_group(str(path), mode="a")
            with self._lock:
                self._open[key] = g
        return g

    # -- creation -------------------------------------------------------------
    def create_job(self, job_id, body_names, capacity=0, durable=True, indicator=False,
                   particles=()):
        """Create (or reset) a job's group with sample arrays of up to one chunk of rows.

        ``capacity`` (the rows the whole run needs) only caps the first size:
        the arrays start at most one Zarr chunk long and double as commits
        need rows (a handful of metadata writes over a whole run). Sizing them
        for the whole run up front would make trimming a cancelled job walk
        every chunk key of the plan (a 1 Gyr job sampled every step: 10^6 keys
        per array, gigabytes of memory). Unwritten rows read as NaN (step -1).
        With ``indicator`` the group also has the chaos indicator's series;
        with ``particles`` (their names) the test particles' arrays.
        """
        capacity = min(int(capacity), defaults.SAMPLE_CHUNK)
        try:
            path = self.job_path(job_id)
            self._forget(job_id)
            key = _template_key(body_names, capacity, indicator, particles)
            self._made = {int(job_id): key}
            tpl = self._templates.get(key)
            if tpl is None:
                # All groups and arrays in one batch on zarr's event loop; the
                # bytes it wrote are kept as the template of every later job
                # with the same bodies and first size (the members of an
                # ensemble), which is then written as plain files.
                _run(_create_async(path, list(body_names), capacity, bool(indicator),
                                   tuple(particles)))
                files = {}
                for root, _, names in os.walk(path):
                    for n in names:
                        full = os.path.join(root, n)
                        with open(full, "rb") as fh:
                            files[os.path.relpath(full, path)] = fh.read()
                self._templates = {key: {"files": files, "dirs": _new_folders(files, ())}}
            else:
                if path.exists():
                    shutil.rmtree(path)
                os.mkdir(path)
                _write_new(path, tpl["dirs"], tpl["files"].items())
            # The new group's metadata is durable before anything refers to it
            # (with durable=False the caller makes it so, see sync_all).
            if durable:
                files, dirs = [], [str(self.root), str(path)]
                for root, subdirs, names in os.walk(path):
                    dirs.append(root)
                    files.extend(os.path.join(root, n) for n in names)
                _fsync_paths(files, dirs)
        except OSError as err:
            raise StoreError(f"could not create the store for job {job_id}: {err}") from err

    def _forget(self, job_id):
        with self._lock:
            for key in (int(job_id), ("async", int(job_id))):
                self._open.pop(key, None)

    def prepare(self, job_id, checkpoint=None, fence=None):
        """Open a job's arrays and create the next checkpoint's array ahead of time.

        ``checkpoint`` is (idx, fence, layout) with the layout from
        :func:`state_layout`. Workers call this from a helper thread while the
        kernel runs (the kernels release the GIL), so none of it costs wall
        time; the commit then only writes the data. A prepared checkpoint that
        is never committed is ignored like any uncommitted one.
        """
        try:
            if checkpoint is not None:
                fence = checkpoint[1]
            h = self._handles(job_id, fence)
            if checkpoint is not None:
                idx, fence, layout = checkpoint
                name = self._ck_name(idx, fence)
                nbytes = sum(entry[4] for entry in layout)
                # The array's metadata, written as the file zarr would write
                # (tested byte for byte); its one chunk is written by the
                # commit, which also makes both durable.
                d = self.job_path(job_id) / "checkpoints" / name
                _put(str(d / "zarr.json"), _ck_metadata(name, nbytes, layout), durable=False)
                h["ready"][name] = (nbytes, layout)
        except OSError as err:
            raise StoreError(f"could not prepare the store of job {job_id}: {err}") from err

    def _handles(self, job_id, fence=None):
        """A job's checkpoints group and sample arrays, asynchronous, for one fencing token.

        What a token's writes learn (the last chunk written, prepared
        checkpoint arrays) is kept only while the same token writes: a job
        that moved to another worker and back has a new token, so none of it
        is trusted. The opened arrays themselves are kept across tokens when
        every metadata file they were opened from still holds the same bytes
        (read again and compared, a fraction of parsing them: an ensemble's
        members change token at every chunk); the store keeps them for its
        last KEPT_JOBS jobs. With ``fence=None`` nothing is kept.
        """
        key = ("async", int(job_id))
        with self._lock:
            h = self._open.get(key)
            if h is not None:
                self._open.move_to_end(key)
            self._drop_old_tails()
        if h is not None and fence is not None and h["fence"] == fence:
            return h
        base = self.job_path(job_id)
        if not base.exists():
            raise StoreError(f"job {job_id} has no Zarr group at {base}.")
        names = self._sample_keys(job_id)
        snap = _metadata_bytes(base, names)
        if (h is not None and fence is not None and h["snap"] is not None
                and h["snap"] == snap):
            h.update(fence=fence, tail={}, ready={})
            return h
        with self._lock:
            self._open.pop(key, None)
        try:
            h = _run(self._open_async(job_id, names))
        except Exception as err:  # noqa: BLE001 - zarr raises many types on bad metadata
            raise _store_error(job_id, base, "the sample arrays", err) from None
        h["fence"] = fence
        # Kept across tokens only if nothing changed while zarr read the files.
        h["snap"] = snap if snap is not None and _metadata_bytes(base, names) == snap else None
        if fence is not None:
            with self._lock:
                self._open[key] = h
                while len(self._open) > self.KEPT_JOBS:
                    self._open.popitem(last=False)
                self._drop_old_tails()
        return h

    def _drop_old_tails(self):
        """Keep the cached last chunks (up to PARTICLE_CHUNK_BYTES each) of the two
        jobs used last only: the one being worked and the one whose last commit
        may still run behind it. Another job's are never used again before its
        next claim, whose new token starts from the disk; so a worker going
        through an ensemble holds two jobs' chunks, not KEPT_JOBS'. (Caller
        holds self._lock.)"""
        handles = [h for k, h in self._open.items() if isinstance(k, tuple)]
        for h in handles[:-2]:
            if h["tail"]:
                h["tail"] = {}

    def _sample_keys(self, job_id):
        """The sample arrays a job's store has (stores made before ``time_yr`` lack it)."""
        base = self.job_path(job_id) / "samples"
        return [k for k in list(_SERIES) + ["elements"] + list(_OPTIONAL)
                if k not in ("time_yr",) + _OPTIONAL or (base / k / "zarr.json").exists()]

    async def _open_async(self, job_id, names):
        from zarr.api import asynchronous as za
        from zarr.storage import LocalStore

        root = LocalStore(str(self.job_path(job_id)))
        # The job's and the samples' group metadata are read too, so a damaged
        # one stops the writer here (with the file named) rather than later
        # in a reader's hands.
        opened = await asyncio.gather(
            za.open_group(store=root, path="checkpoints", mode="r+"),
            za.open_group(store=root, mode="r"),
            za.open_group(store=root, path="samples", mode="r"),
            *[za.open_array(store=root, path=f"samples/{k}", mode="r+", config=_WRITE_ALL)
              for k in names])
        samples = dict(zip(names, opened[3:]))
        return {"checkpoints": opened[0], "samples": samples,
                "raw": {k: _raw_chunks(a) for k, a in samples.items()},
                "tail": {}, "ready": {}}

    # -- writing: samples and checkpoints in one batch --------------------------
    @staticmethod
    def _ck_name(idx, fence):
        return f"{int(idx):08d}-{int(fence)}"

    def write_chunk(self, job_id, start, block, idx, fence, arrays, durable=True):
        """Write one chunk's samples (rows start..) and its closing checkpoint together.

        All arrays are written in one batch on zarr's event loop, then every
        file and folder touched is fsynced (unless ``durable`` is false).
        Returns (SHA-256 of the samples block, SHA-256 of the state).
        """
        return self._write(job_id, (start, block), (idx, fence, arrays), durable, fence)

    def write_first(self, job_id, block, arrays, durable=True):
        """Write a new job's first sample row and checkpoint 0 in one batch (nothing kept
        cached: a submit of many jobs holds no handles). Returns (samples, state) SHA-256.

        Right after :meth:`create_job`, the members of an ensemble differ only
        in the bytes of the first chunk of each sample array and of checkpoint
        0: the first job is written through zarr, and the files it wrote give
        the names, shapes and fill values with which the later ones are written
        as plain files (the same bytes zarr would write; tested).
        """
        made = self._made.pop(int(job_id), None)
        if "time_yr" not in block:
            block = dict(block, time_yr=block["time"] / YEAR_D)
        ck = (self._ck_name(0, 0),) + _packed(arrays)
        key = None if made is None else (made, json.dumps(ck[2]))
        first = self._firsts.get(key) if key is not None else None
        if first is None or not _fits(first, block):
            hashes = self._write(job_id, (0, block), (0, 0, arrays), durable, None)
            if key is not None:
                self._firsts = {key: self._first_layout(job_id, block, ck[0], made)}
            return hashes
        self._first_files(job_id, first, block, ck, durable)
        return samples_sha256(block), ck[3]

    def _first_files(self, job_id, first, block, ck, durable):
        """Write a first sample row and checkpoint 0 into a just-created group, as plain
        files laid out like an earlier job's (see :meth:`write_first`)."""
        base = self.job_path(job_id)
        puts = []
        for name, (rel, shape, dtype, fill) in first["samples"].items():
            chunk = np.full(shape, fill, dtype=dtype)
            chunk[:len(block[name])] = block[name]
            puts.append((rel, chunk.tobytes()))
        puts.append(first["ck_meta"])
        puts.append((first["ck_chunk"], ck[1].tobytes()))
        try:
            _write_new(base, first["dirs"], puts)
            if durable:
                _fsync_paths([str(base / rel) for rel, _ in puts],
                             [str(base / d) for d in first["sync_dirs"]])
        except OSError as err:
            raise StoreError(f"could not write checkpoint 0 of job {job_id}: {err}") from err

    def new_jobs(self, durable=False):
        """A batch that creates many new jobs' stores: ``with store.new_jobs() as b:
        b.add(...)``. See :class:`_NewJobs`."""
        return _NewJobs(self, durable)

    def _fresh_job(self, job_id, template, first, block, ck, durable):
        """create_job + write_first for a job whose layout is known (thread-safe)."""
        path = self.job_path(job_id)
        tpl = self._templates[template]
        try:
            if path.exists():
                shutil.rmtree(path)
            os.mkdir(path)
            _write_new(path, tpl["dirs"], tpl["files"].items())
            if durable:
                _fsync_paths([str(path / rel) for rel in tpl["files"]],
                             [str(self.root)] + [str(path / d) for d in ("",) + tuple(tpl["dirs"])])
        except OSError as err:
            raise StoreError(f"could not create the store for job {job_id}: {err}") from err
        self._first_files(job_id, first, block, ck, durable)

    def _first_layout(self, job_id, block, ck_name, template):
        """Names, shapes and fill values of what a first write wrote, or None (not raw)."""
        h = self._handles(job_id, None)
        samples = {}
        for name, a in h["samples"].items():
            raw = h["raw"][name]
            if raw is None or name not in block:
                return None
            rel = f"samples/{name}/" + a.metadata.encode_chunk_key((0,) * a.ndim)
            samples[name] = (rel, raw[0], raw[1], a.metadata.fill_value)
        d = self.job_path(job_id) / "checkpoints" / ck_name
        meta = d / "zarr.json"
        chunk = d / "c" / "0"
        if not chunk.exists():
            return None
        rels = [r for r, *_ in samples.values()] + [f"checkpoints/{ck_name}/c/0"]
        tpl = self._templates.get(template)
        return {"samples": samples,
                "ck_meta": (f"checkpoints/{ck_name}/zarr.json", meta.read_bytes()),
                "ck_chunk": f"checkpoints/{ck_name}/c/0",
                # Folders a first write adds to a fresh group, parents first.
                "dirs": _new_folders(rels, () if tpl is None else tpl["files"]),
                # Every folder that gains an entry, for a durable write.
                "sync_dirs": sorted({d for rel in rels for d in _folders(rel)})}

    @staticmethod
    def sync_all():
        """Make every file written so far durable at once (sync(2), which on Linux
        returns when the data are on disk): one barrier for a submit of many jobs
        written with durable=False, before the database commit refers to them."""
        os.sync()

    def write_checkpoint(self, job_id, idx, fence, arrays, durable=True):
        """Write a checkpoint's state arrays; returns their SHA-256."""
        return self._write(job_id, None, (idx, fence, arrays), durable, fence)[1]

    def write_samples(self, job_id, start, block, durable=True, fence=None):
        """Write a block of samples at rows start..; returns the block's SHA-256.

        The arrays are sized for the whole run at creation and grow
        geometrically if a job is extended, so rows beyond the committed
        count may hold fill values or uncommitted data until
        :meth:`trim_samples` cuts them when the job ends; readers use the
        ledger's committed count. ``fence`` is the writer's fencing token
        (None: a one-off write that keeps nothing cached).
        """
        return self._write(job_id, (start, block), None, durable, fence)[0]

    def _write(self, job_id, samples, checkpoint, durable, fence):
        ck = None
        if checkpoint is not None:
            idx, fence, arrays = checkpoint
            ck = (self._ck_name(idx, fence),) + _packed(arrays)
        h = None
        try:
            h = self._handles(job_id, fence)
            if samples is not None and "time_yr" not in samples[1]:
                samples = (samples[0], dict(samples[1], time_yr=samples[1]["time"] / YEAR_D))
            puts, grow, coros, files, dirs = _plan(h, self.job_path(job_id), samples, ck)
            if grow:
                h["snap"] = None  # the arrays' metadata changes: open them afresh next token
            for batch in (grow, coros):
                if batch:
                    _run(_gather(batch))
            _in_pool([(_put, path, data, durable) for path, data in puts])
            if samples is not None and checkpoint is not None:
                failpoint("mid_store_write")  # data written, folders not yet fsynced
            if durable:
                _fsync_paths(files, dirs)
        except OSError as err:
            if h is not None:
                h["tail"].clear()  # the cached chunk may not be what the disk holds
                h["snap"] = None
            what = "samples" if checkpoint is None else f"checkpoint {checkpoint[0]}"
            raise StoreError(f"could not write {what} of job {job_id}: {err}") from err
        return (None if samples is None else samples_sha256(samples[1]),
                None if ck is None else ck[3])

    def read_checkpoint(self, job_id, idx, fence, expect_sha256=None):
        """Read a checkpoint's state arrays, checking their hash if one is given."""
        name = self._ck_name(idx, fence)
        if not self.job_path(job_id).exists():
            raise StoreError(f"job {job_id} has no Zarr group at {self.job_path(job_id)}.")
        try:
            # The store's own checkpoints are read as plain files (no zarr
            # import on the resume path); anything else goes through zarr.
            raw = _raw_checkpoint(self.job_path(job_id) / "checkpoints" / name)
            blob, layout = raw if raw is not None else _run(self._read_async(job_id, name))
            storable = {}
            for key, dtype, shape, offset, nbytes in layout:
                storable[key] = np.frombuffer(blob[offset:offset + nbytes],
                                              dtype=np.dtype(dtype)).reshape(shape).copy()
        except (KeyError, OSError, ValueError) as err:
            raise StoreError(f"checkpoint {idx} of job {job_id} could not be read "
                             f"({type(err).__name__}: {err}).") from None
        except Exception as err:  # noqa: BLE001 - zarr raises codec errors of many types
            meta = _damaged_metadata(self.job_path(job_id) / "checkpoints" / name)
            where = f"; its metadata file {meta} is damaged" if meta else ""
            raise StoreError(f"checkpoint {idx} of job {job_id} is damaged{where} "
                             f"({type(err).__name__}: {err}).") from None
        if expect_sha256 is not None and state_sha256(storable) != expect_sha256:
            raise StoreError(f"checkpoint {idx} of job {job_id} does not match its recorded "
                             "hash; the store is damaged.")
        return from_storable(storable)

    async def _read_async(self, job_id, name):
        from zarr.api import asynchronous as za
        from zarr.storage import LocalStore

        root = LocalStore(str(self.job_path(job_id)), read_only=True)
        arr = await za.open_array(store=root, path=f"checkpoints/{name}", mode="r")
        data = await arr.getitem(slice(None))
        return np.asarray(data).tobytes(), arr.attrs["layout"]

    def trim_samples(self, job_id, n, fence=None):
        """Cut the sample arrays to exactly the n committed rows."""
        try:
            h = self._handles(job_id, fence)
            h["tail"].clear()
            arrs = h["samples"]
            todo = [a for a in arrs.values() if a.shape[0] != n]
            if todo:
                h["snap"] = None
                _run(_gather([a.resize((n,) + tuple(a.shape[1:])) for a in todo]))
                base = self.job_path(job_id) / "samples"
                _fsync_paths([str(base / k / "zarr.json") for k in arrs], [])
        except OSError as err:
            raise StoreError(f"could not trim samples of job {job_id}: {err}") from err

    def read_samples(self, job_id, n=None, start=0):
        """Committed samples as a dict of arrays (rows start..n)."""
        g = self._group(job_id, "r")
        try:
            s = g["samples"]
            arrays = {key: s[key] for key in self._sample_keys(job_id)}
        except Exception as err:  # noqa: BLE001 - zarr raises many types on bad metadata
            raise _store_error(job_id, self.job_path(job_id), "the sample arrays", err) from None
        stop = arrays["time"].shape[0] if n is None else n
        short = [k for k, a in arrays.items() if a.shape[0] < stop]
        if short:
            raise StoreError(f"job {job_id} has {arrays[short[0]].shape[0]} stored rows of "
                             f"samples/{short[0]}, fewer than the {stop} committed; the store "
                             "is damaged.")
        try:
            return {key: np.asarray(a[start:stop]) for key, a in arrays.items()}
        except Exception as err:  # noqa: BLE001 - zarr raises codec errors of many types
            raise StoreError(f"samples of job {job_id} (rows {start}..{stop - 1}) are damaged "
                             f"and could not be read ({type(err).__name__}: {err}).") from None

    def particle_names(self, job_id):
        """Names of the job's test particles (the store's particle labels); [] without."""
        g = self._group(job_id, "r")
        try:
            s = g["samples"]
            if "particle" not in s:
                return []
            return [str(x) for x in np.asarray(s["particle"][:])]
        except Exception as err:  # noqa: BLE001 - zarr raises many types on bad metadata
            raise _store_error(job_id, self.job_path(job_id), "the particle labels", err) \
                from None

    def body_names(self, job_id):
        """Body names (star first) recorded when the job's group was created."""
        try:
            return list(self._group(job_id, "r").attrs["body_names"])
        except KeyError:
            raise StoreError(f"job {job_id}: the store's group has no body names; its "
                             "metadata is damaged.") from None


class _NewJobs:
    """Create many new jobs' stores (an ensemble's members) inside one submit.

    :meth:`add` returns a job's (samples, state) SHA-256 at once, computed from
    the data, so the caller can write the ledger rows; the files are written
    by a few threads (folder and file creation release the GIL and the
    filesystem serves them concurrently). The first job of a layout is
    written synchronously through zarr and gives the layout of the rest.
    Leaving the ``with`` block waits for every write and raises the first
    error, so the caller commits only when every store is complete (and, with
    ``durable=False``, after :meth:`Store.sync_all`).
    """

    MAX_PENDING = 256

    def __init__(self, store, durable):
        self.store = store
        self.durable = durable
        self.pending = []
        self.pool = None

    def __enter__(self):
        return self

    def add(self, job_id, body_names, capacity, block, arrays, indicator=False, particles=()):
        st = self.store
        if "time_yr" not in block:
            block = dict(block, time_yr=block["time"] / YEAR_D)
        template = _template_key(body_names, min(int(capacity), defaults.SAMPLE_CHUNK),
                                 indicator, particles)
        ck = (st._ck_name(0, 0),) + _packed(arrays)
        first = st._firsts.get((template, json.dumps(ck[2])))
        if first is None or template not in st._templates or not _fits(first, block):
            self.wait()  # the templates change only with nothing in flight
            st.create_job(job_id, body_names, capacity, durable=self.durable, indicator=indicator,
                          particles=particles)
            return st.write_first(job_id, block, arrays, durable=self.durable)
        if self.pool is None:
            from concurrent.futures import ThreadPoolExecutor

            self.pool = ThreadPoolExecutor(max_workers=4, thread_name_prefix="store-new")
        self.pending.append(self.pool.submit(st._fresh_job, job_id, template, first, block, ck,
                                             self.durable))
        if len(self.pending) > self.MAX_PENDING:
            self.wait(self.MAX_PENDING // 2)
        return samples_sha256(block), ck[3]

    def wait(self, keep=0):
        """Wait until at most `keep` writes are in flight; re-raise the first error."""
        while len(self.pending) > keep:
            self.pending.pop(0).result()

    def __exit__(self, kind, err, tb):
        try:
            if kind is None:
                self.wait()
            else:
                # Failing anyway: let the writes in flight end, keep the first error.
                for fut in self.pending:
                    fut.exception()
                self.pending = []
        finally:
            if self.pool is not None:
                self.pool.shutdown(wait=True)
        return False
