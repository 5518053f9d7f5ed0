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

This module holds the :class:`Store` (creating, preparing, writing and
reading a job's group); the layout's names and metadata are in
:mod:`runner.store.layout`, the packing and hashing of checkpoint arrays in
:mod:`runner.store.packing`, and what one commit writes, as files, in
:mod:`runner.store.raw_writes`.
"""

import asyncio
import errno
import json
import os
import shutil
import threading
from collections import OrderedDict
from pathlib import Path

import numpy as np

from orbitledger.runner import defaults
from orbitledger.runner.diskspace import human_bytes as _bytes, no_space_text
from orbitledger.runner.errors import DiskFullError, StoreError
from orbitledger.runner.execution.failpoints import failpoint
from orbitledger.runner.store.chain import chain_sha256
from orbitledger.runner.store.layout import (_OPTIONAL, _SERIES, ELEMENT_NAMES,
                                             YEAR_D, _ck_metadata, _create_async,
                                             _damaged_metadata, _folders, _job_dir_name,
                                             _metadata_bytes, _new_folders, _store_error,
                                             _template_key, _write_new)
from orbitledger.runner.store.new_jobs import NewJobs
from orbitledger.runner.store.packing import (DERIVED_SAMPLES, _packed, _raw_checkpoint,
                                              from_storable, samples_sha256, state_layout,
                                              state_sha256, to_storable)
from orbitledger.runner.store.raw_writes import (_WRITE_ALL, _fits, _fsync_paths, _gather,
                                                 _in_pool, _plan, _put, _raw_chunks, _run)

# The store's API, whichever of the modules above holds each part.
__all__ = ["Store", "to_storable", "from_storable", "state_layout", "state_sha256",
           "samples_sha256", "chain_sha256", "DERIVED_SAMPLES", "ELEMENT_NAMES", "YEAR_D"]


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
        b.add(...)``. See :class:`runner.store.new_jobs.NewJobs`."""
        return NewJobs(self, durable)

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
        h = puts = None
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
            if err.errno == errno.ENOSPC:
                need = sum(len(memoryview(d).cast("B")) for _, d in (puts or ()))
                raise DiskFullError(no_space_text(
                    f"the store {self.root}", self.root,
                    f"writing the {what} of job {job_id} needs about {_bytes(need)}")) from err
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
