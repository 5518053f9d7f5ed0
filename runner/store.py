"""The checkpoint store: one Zarr group per job.

Layout of ``store/job-00000042/``::

    checkpoints/00000007-3         exact integrator state of checkpoint 7, written
                                   under fencing token 3 (never rewritten): one
                                   uint8 array holding every state array's raw
                                   bytes; its attribute "layout" lists each
                                   array's key, dtype, shape and byte offset
    samples/time, step, energy_error, angmom_error   (sample,)
    samples/elements                                 (sample, body, element)

The database says how many checkpoints and samples are committed; samples
beyond that count are ignored and overwritten on resume. Checkpoint groups
carry the fencing token in their name so a worker whose lease was taken over
can never overwrite the state another worker committed.
"""

import hashlib
import json
import os
from pathlib import Path

import numpy as np
import zarr

from . import defaults
from .errors import StoreError

ELEMENT_NAMES = ["a", "e", "i", "node", "peri", "mean_anomaly"]
_SERIES = {
    "time": ("f8", ["sample"]),
    "step": ("i8", ["sample"]),
    "energy_error": ("f8", ["sample"]),
    "angmom_error": ("f8", ["sample"]),
}


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
    if "names" in out and out["names"].dtype == np.uint8:
        out["names"] = np.array(json.loads(bytes(out["names"]).decode("utf-8")), dtype=np.str_)
    return out


def state_sha256(storable):
    """SHA-256 over keys, dtypes, shapes and bytes of storable arrays, keys sorted."""
    h = hashlib.sha256()
    for key in sorted(storable):
        arr = np.ascontiguousarray(storable[key])
        h.update(key.encode("utf-8") + b"\0" + arr.dtype.str.encode() + b"\0"
                 + repr(arr.shape).encode() + b"\0")
        h.update(arr.tobytes())
    return h.hexdigest()


def chain_sha256(previous, state_hash, samples_hash):
    """Hash-chain link: covers the previous link, this state and this chunk's samples."""
    return hashlib.sha256(f"{previous}:{state_hash}:{samples_hash}".encode()).hexdigest()


def samples_sha256(block):
    """SHA-256 of one block of samples (dict of arrays), keys sorted."""
    return state_sha256(block)


def _fsync_tree(path, since):
    """fsync files under path modified at or after `since`, then their folders."""
    dirs = set()
    for root, _dirs, files in os.walk(path):
        for name in files:
            p = os.path.join(root, name)
            try:
                if os.stat(p).st_mtime >= since:
                    fd = os.open(p, os.O_RDONLY)
                    try:
                        os.fsync(fd)
                    finally:
                        os.close(fd)
                    dirs.add(root)
            except FileNotFoundError:
                continue
    for d in dirs:
        fd = os.open(d, os.O_RDONLY)
        try:
            os.fsync(fd)
        finally:
            os.close(fd)


class Store:
    """Zarr checkpoint store rooted at a folder.

    Parameters
    ----------
    root : str or Path
        The store folder (created if missing).
    """

    def __init__(self, root):
        self.root = Path(root)
        self._open = {}

    def job_path(self, job_id):
        """Folder of a job's Zarr group."""
        return self.root / _job_dir_name(job_id)

    def _group(self, job_id, mode="a"):
        path = self.job_path(job_id)
        if mode == "r" and not path.exists():
            raise StoreError(f"job {job_id} has no Zarr group at {path}.")
        if mode == "r":
            return zarr.open_group(str(path), mode="r")
        # Writers reuse their handle: opening a group re-reads its metadata.
        key = int(job_id)
        if key not in self._open:
            self._open[key] = zarr.open_group(str(path), mode="a")
        return self._open[key]

    # -- creation -------------------------------------------------------------
    def create_job(self, job_id, body_names, capacity=0):
        """Create (or reset) a job's group with sample arrays of `capacity` rows.

        Sizing the arrays for the whole run up front costs no disk (unwritten
        Zarr chunks do not exist) and spares a resize per commit; unwritten
        rows read as NaN (step -1).
        """
        try:
            path = self.job_path(job_id)
            self._open.pop(int(job_id), None)
            self._open.pop(("samples", int(job_id)), None)
            g = zarr.open_group(str(path), mode="w")
            g.attrs["body_names"] = list(body_names)
            g.attrs["element_names"] = ELEMENT_NAMES
            g.attrs["units"] = {"time": "d", "a": "au", "angles": "deg"}
            s = g.create_group("samples")
            for key, (dtype, dims) in _SERIES.items():
                # Uncompressed: appends rewrite partly filled chunks, and float
                # time series compress poorly anyway.
                s.create_array(key, shape=(capacity,), dtype=dtype,
                               chunks=(defaults.SAMPLE_CHUNK,), dimension_names=dims,
                               compressors=None, fill_value=-1 if dtype == "i8" else np.nan)
            nb = len(body_names) - 1
            s.create_array("elements", shape=(capacity, nb, 6), dtype="f8", fill_value=np.nan,
                           chunks=(defaults.SAMPLE_CHUNK, nb, 6),
                           dimension_names=["sample", "body", "element"], compressors=None)
            s.attrs["body_names"] = list(body_names[1:])
            g.create_group("checkpoints")
            self._open[int(job_id)] = g
        except OSError as err:
            raise StoreError(f"could not create the store for job {job_id}: {err}") from err

    # -- checkpoints ----------------------------------------------------------
    @staticmethod
    def _ck_name(idx, fence):
        return f"{int(idx):08d}-{int(fence)}"

    def write_checkpoint(self, job_id, idx, fence, arrays, durable=True):
        """Write a checkpoint's state arrays; returns their SHA-256."""
        import time as _time

        t0 = _time.time() - 1.0
        storable = to_storable(arrays)
        layout, parts, offset = [], [], 0
        for key in sorted(storable):
            arr = storable[key]
            layout.append([key, arr.dtype.str, list(arr.shape), offset, arr.nbytes])
            parts.append(arr.tobytes())
            offset += arr.nbytes
        blob = np.frombuffer(b"".join(parts), dtype=np.uint8)
        digest = state_sha256(storable)
        name = self._ck_name(idx, fence)
        try:
            g = self._group(job_id)
            ck = g["checkpoints"].create_array(
                name, shape=blob.shape, dtype="u1", chunks=blob.shape, compressors=None,
                overwrite=True, attributes={"layout": layout, "state_sha256": digest})
            ck[...] = blob
            if durable:
                _fsync_tree(self.job_path(job_id) / "checkpoints" / name, t0)
        except OSError as err:
            raise StoreError(f"could not write checkpoint {idx} of job {job_id}: {err}") from err
        return digest

    def read_checkpoint(self, job_id, idx, fence, expect_sha256=None):
        """Read a checkpoint's state arrays, checking their hash if one is given."""
        name = self._ck_name(idx, fence)
        try:
            ck = self._group(job_id, "r")["checkpoints"][name]
            blob = np.asarray(ck[...]).tobytes()
            storable = {}
            for key, dtype, shape, offset, nbytes in ck.attrs["layout"]:
                storable[key] = np.frombuffer(blob[offset:offset + nbytes],
                                              dtype=np.dtype(dtype)).reshape(shape).copy()
        except (KeyError, OSError, ValueError) as err:
            raise StoreError(f"checkpoint {idx} of job {job_id} could not be read "
                             f"({type(err).__name__}: {err}).") from None
        except Exception as err:  # noqa: BLE001 - zarr raises codec errors of many types
            raise StoreError(f"checkpoint {idx} of job {job_id} is damaged "
                             f"({type(err).__name__}: {err}).") from None
        if expect_sha256 is not None and state_sha256(storable) != expect_sha256:
            raise StoreError(f"checkpoint {idx} of job {job_id} does not match its recorded "
                             "hash; the store is damaged.")
        return from_storable(storable)

    # -- samples --------------------------------------------------------------
    def write_samples(self, job_id, start, block, durable=True):
        """Write a block of samples at rows start...

        The arrays grow geometrically, so rows beyond the committed count may
        hold fill values or uncommitted data until :meth:`trim_samples` cuts
        them when the job ends; readers use the ledger's committed count.
        Returns the SHA-256 of the block.
        """
        import time as _time

        t0 = _time.time() - 1.0
        n = len(block["time"])
        try:
            arrays = self._sample_arrays(job_id)
            need = start + n
            if arrays["time"].shape[0] < need:
                cap = max(need, 2 * arrays["time"].shape[0], defaults.SAMPLE_CHUNK)
                for arr in arrays.values():
                    arr.resize((cap,) + tuple(arr.shape[1:]))
            if n:
                for key, arr in arrays.items():
                    arr[start:need] = block[key]
            if durable:
                _fsync_tree(self.job_path(job_id) / "samples", t0)
        except OSError as err:
            raise StoreError(f"could not write samples of job {job_id}: {err}") from err
        return samples_sha256(block)

    def trim_samples(self, job_id, n):
        """Cut the sample arrays to exactly the n committed rows."""
        try:
            for arr in self._sample_arrays(job_id).values():
                if arr.shape[0] != n:
                    arr.resize((n,) + tuple(arr.shape[1:]))
        except OSError as err:
            raise StoreError(f"could not trim samples of job {job_id}: {err}") from err

    def _sample_arrays(self, job_id):
        key = ("samples", int(job_id))
        if key not in self._open:
            s = self._group(job_id)["samples"]
            self._open[key] = {k: s[k] for k in list(_SERIES) + ["elements"]}
        return self._open[key]

    def read_samples(self, job_id, n=None, start=0):
        """Committed samples as a dict of arrays (rows start..n)."""
        s = self._group(job_id, "r")["samples"]
        stop = s["time"].shape[0] if n is None else n
        if stop > s["time"].shape[0]:
            raise StoreError(f"job {job_id} has {s['time'].shape[0]} stored samples, fewer "
                             f"than the {stop} committed; the store is damaged.")
        try:
            return {key: np.asarray(s[key][start:stop]) for key in list(_SERIES) + ["elements"]}
        except Exception as err:  # noqa: BLE001 - zarr raises codec errors of many types
            raise StoreError(f"samples of job {job_id} are damaged and could not be read "
                             f"({type(err).__name__}: {err}).") from None

    def body_names(self, job_id):
        """Body names (star first) recorded when the job's group was created."""
        return list(self._group(job_id, "r").attrs["body_names"])
