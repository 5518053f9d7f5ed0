"""Many new jobs' stores made inside one submit (an ensemble's members), written
by a few threads from the first member's layout (see :meth:`Store.new_jobs`)."""

import json

from orbitledger.runner import defaults
from orbitledger.runner.store.layout import YEAR_D, _template_key
from orbitledger.runner.store.packing import _packed, samples_sha256
from orbitledger.runner.store.raw_writes import _fits


class NewJobs:
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
