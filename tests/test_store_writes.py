"""The store's commit writes: whole raw chunks, checked against zarr's own reader."""

import numpy as np
import pytest
import xarray as xr

from orbitledger.runner import defaults
from orbitledger.runner.store.zarr_store import Store, state_layout

BODIES = ["Star", "b", "c", "d"]


def _block(rng, start, n):
    return {"time": start + np.arange(n, dtype=float),
            "step": start + np.arange(n, dtype=np.int64),
            "energy_error": rng.standard_normal(n),
            "angmom_error": rng.standard_normal(n),
            "elements": rng.standard_normal((n, len(BODIES) - 1, 6))}


def _expected(blocks):
    return {k: np.concatenate([b[k] for b in blocks]) for k in blocks[0]}


@pytest.mark.parametrize("raw", [True, False], ids=["raw-chunks", "through-zarr"])
def test_blocks_of_any_size_read_back_exactly(tmp_path, raw):
    rng = np.random.default_rng(7)
    store = Store(tmp_path / "s")
    store.create_job(1, BODIES, capacity=100)  # small: the arrays must grow too
    if not raw:
        store._handles(1, 1)["raw"] = dict.fromkeys(store._handles(1, 1)["raw"])
    blocks, start = [], 0
    sizes = [1, 5, defaults.SAMPLE_CHUNK - 6, 1, 2 * defaults.SAMPLE_CHUNK + 3, 0, 700, 1]
    for i, n in enumerate(sizes):
        if i == 4:
            # A new process resuming: nothing cached, the partial chunk is read back.
            store = Store(tmp_path / "s")
            if not raw:
                store._handles(1, 1)["raw"] = dict.fromkeys(store._handles(1, 1)["raw"])
        b = _block(rng, start, n)
        store.write_samples(1, start, b, fence=1)
        blocks.append(b)
        start += n
    want = _expected(blocks)
    got = Store(tmp_path / "s").read_samples(1, n=start)
    for k in want:
        assert got[k].tobytes() == want[k].tobytes(), k
    store.trim_samples(1, start, fence=1)
    ds = xr.open_zarr(str(tmp_path / "s" / "job-00000001" / "samples"), consolidated=False)
    assert ds.sizes["sample"] == start
    assert ds["elements"].values.tobytes() == want["elements"].tobytes()
    assert ds["step"].values.tobytes() == want["step"].tobytes()


def test_rewriting_uncommitted_rows_keeps_the_committed_ones(tmp_path):
    # A resumed worker writes from the committed count again: rows before it
    # in the same chunk stay, the rest is replaced.
    rng = np.random.default_rng(8)
    store = Store(tmp_path / "s")
    store.create_job(1, BODIES, capacity=3000)
    first = _block(rng, 0, 10)
    store.write_samples(1, 0, first)
    store.write_samples(1, 10, _block(rng, 10, 30))  # never committed
    store = Store(tmp_path / "s")
    again = _block(rng, 10, 20)
    store.write_samples(1, 10, again)
    got = store.read_samples(1, n=30)
    want = _expected([first, again])
    for k in want:
        assert got[k].tobytes() == want[k].tobytes(), k


def test_prepared_checkpoint_holds_exactly_the_state_written(tmp_path):
    store = Store(tmp_path / "s")
    store.create_job(1, BODIES, capacity=4)
    state = {"x": np.arange(12.0).reshape(4, 3), "step": np.array([5]),
             "names": np.array(BODIES)}
    store.prepare(1, (1, 3, state_layout(state)))
    later = dict(state, x=state["x"] * 2)  # same layout, new values
    digest = store.write_checkpoint(1, 1, 3, later)
    back = Store(tmp_path / "s").read_checkpoint(1, 1, 3, expect_sha256=digest)
    assert back["x"].tobytes() == later["x"].tobytes()
    assert list(back["names"]) == BODIES
    # A state whose layout differs from the prepared one is written in full.
    store.prepare(1, (2, 3, state_layout(state)))
    bigger = dict(state, x=np.ones((5, 3)))
    digest = store.write_checkpoint(1, 2, 3, bigger)
    assert Store(tmp_path / "s").read_checkpoint(1, 2, 3, expect_sha256=digest)["x"].shape \
        == (5, 3)


def test_samples_open_in_xarray_as_a_self_describing_dataset(tmp_path):
    import matplotlib

    matplotlib.use("Agg")
    from orbitledger.runner.ledger.operations import Ledger
    from orbitledger.runner.execution.worker import Worker
    from helpers import small_spec

    led = Ledger(f"sqlite:///{tmp_path}/l.sqlite", tmp_path / "store")
    jid = led.submit(small_spec(length="300 yr"))
    Worker(led).run()
    ds = xr.open_zarr(str(led.store.job_path(jid) / "samples"), consolidated=False)
    assert {"time", "time_yr", "step", "body", "element"} <= set(ds.coords)
    assert ds["time"].attrs["units"] == "day"
    assert ds["time_yr"].attrs["units"] == "yr"
    # Julian year of 365.25 d (IAU; e.g. Urban & Seidelmann 2013, Explanatory
    # Supplement, 3rd ed., table of constants).
    np.testing.assert_allclose(ds["time_yr"].values * 365.25, ds["time"].values, rtol=1e-15)
    assert list(ds["body"].values) == ["Orrin b", "Orrin c", "Orrin d"]
    e_c = ds["elements"].sel(body="Orrin c", element="e").values
    assert e_c[0] == pytest.approx(0.04, abs=1e-9)  # the spec's eccentricity of Orrin c
    ax = ds["energy_error"].plot(x="time")[0].axes
    assert " ".join(ax.get_xlabel().split()) == "time since the start of the integration [day]"
    assert "relative energy error" in ax.get_ylabel()
    ax = ds["elements"].sel(body="Orrin b", element="a").plot(x="time_yr")[0].axes
    assert " ".join(ax.get_xlabel().split()) == (
        "time since the start of the integration (Julian years of 365.25 d) [yr]")
    # The job's whole group opens as a tree: samples and checkpoints.
    tree = xr.open_datatree(str(led.store.job_path(jid)), engine="zarr", consolidated=False)
    assert {"samples", "checkpoints"} <= set(tree.children)
    assert "time_yr" in tree["samples"].coords
    ck = tree["checkpoints"].to_dataset()
    assert len(ck.data_vars) == len(led.checkpoints(jid))
    assert all("layout" in v.attrs for v in ck.data_vars.values())
    led.close()


def test_a_store_made_before_time_in_years_still_runs_and_verifies(tmp_path):
    import shutil

    from orbitledger.runner.analysis.integrity import verify
    from orbitledger.runner.execution.worker import Worker
    from orbitledger.runner.ledger.operations import Ledger
    from helpers import small_spec

    led = Ledger(f"sqlite:///{tmp_path}/l.sqlite", tmp_path / "store")
    jid = led.submit(small_spec(length="200 yr"))
    shutil.rmtree(led.store.job_path(jid) / "samples" / "time_yr")  # as earlier versions made it
    led.close()
    led = Ledger(f"sqlite:///{tmp_path}/l.sqlite", tmp_path / "store")
    Worker(led).run()
    assert led.job(jid)["status"] == "done"
    assert verify(led, jid).ok
    assert "time_yr" not in led.store.read_samples(jid)
    led.close()


@pytest.mark.damages_store
def test_verify_names_a_time_in_years_that_disagrees_with_the_time_in_days(tmp_path):
    import zarr

    from orbitledger.runner.analysis.integrity import verify
    from orbitledger.runner.execution.worker import Worker
    from orbitledger.runner.ledger.operations import Ledger
    from helpers import small_spec

    led = Ledger(f"sqlite:///{tmp_path}/l.sqlite", tmp_path / "store")
    jid = led.submit(small_spec(length="200 yr"))
    Worker(led).run()
    arr = zarr.open_array(str(led.store.job_path(jid) / "samples" / "time_yr"), mode="r+")
    arr[3] = arr[3] + 1.0
    rep = verify(led, jid)
    assert not rep.ok and "time in years" in rep.problem
    led.close()


def _tree(path):
    out = {}
    for f in sorted(path.rglob("*")):
        if f.is_file():
            out[str(f.relative_to(path))] = f.read_bytes()
    return out


@pytest.mark.parametrize("durable", [True, False])
def test_first_writes_from_the_template_are_the_bytes_zarr_writes(tmp_path, durable):
    # Reproducibility, not correctness: later members of an ensemble get
    # their first row and checkpoint 0 as plain files laid out like the first
    # member's (written through zarr); a job written through zarr alone by a
    # fresh store must be byte-identical, and zarr must read both back.
    from orbitledger.runner.store.zarr_store import _packed

    rng = np.random.default_rng(11)
    state = {"xj": rng.standard_normal((4, 3)), "gm": rng.random(4),
             "step": np.array([0], dtype=np.int64), "names": np.array(BODIES)}
    templated = Store(tmp_path / "t")
    hashes = []
    for job in (1, 2, 3):
        templated.create_job(job, BODIES, capacity=50, durable=durable)
        first = _block(rng, 0, 1)
        state["xj"] = rng.standard_normal((4, 3))
        hashes.append(templated.write_first(job, first, state, durable))
        assert templated._firsts, "the first job's layout is kept for the next"
    # The same inputs for job 3 through zarr only (a new store, no template).
    plain = Store(tmp_path / "p")
    plain.create_job(3, BODIES, capacity=50)
    assert plain.write_first(3, first, state) == hashes[2]
    assert _tree(tmp_path / "t" / "job-00000003") == _tree(tmp_path / "p" / "job-00000003")
    got = Store(tmp_path / "t").read_samples(3, n=1)
    for k in first:
        assert got[k].tobytes() == first[k].tobytes(), k
    back = Store(tmp_path / "t").read_checkpoint(3, 0, 0, expect_sha256=hashes[2][1])
    assert np.array_equal(back["xj"], state["xj"])
    assert hashes[2][1] == _packed(state)[2]


def test_checkpoints_read_as_plain_files_equal_zarrs_reading(tmp_path):
    # Reproducibility of two readers of the same files (not correctness):
    # the plain-file reader of the resume path against zarr's own reader.
    import asyncio

    import zarr

    from orbitledger.runner.store import zarr_store as sm

    store = Store(tmp_path / "s")
    store.create_job(1, BODIES, capacity=4)
    state = {"x": np.random.default_rng(3).standard_normal((4, 3)), "step": np.array([5]),
             "names": np.array(BODIES)}
    store.prepare(1, (1, 3, state_layout(state)))
    digest = store.write_checkpoint(1, 1, 3, state)
    folder = store.job_path(1) / "checkpoints" / "00000001-3"
    raw = sm._raw_checkpoint(folder)
    assert raw is not None
    blob, layout = asyncio.run(Store(tmp_path / "s")._read_async(1, "00000001-3"))
    assert raw == (blob, layout)
    assert Store(tmp_path / "s").read_checkpoint(1, 1, 3, digest)["x"].tobytes() \
        == state["x"].tobytes()

    # An array the store did not write this way (compressed) is not taken as
    # plain bytes: it is read through zarr, and still exactly.
    g = zarr.open_group(str(store.job_path(1) / "checkpoints"), mode="a")
    packed, lay, digest2 = sm._packed(state)
    arr = g.create_array("00000002-3", shape=packed.shape, dtype="u1", chunks=packed.shape,
                         compressors=zarr.codecs.ZstdCodec(level=3), attributes={"layout": lay})
    arr[:] = packed
    assert sm._raw_checkpoint(folder.parent / "00000002-3") is None
    back = Store(tmp_path / "s").read_checkpoint(1, 2, 3, digest2)
    assert back["x"].tobytes() == state["x"].tobytes()

    # A short chunk file is not taken either: zarr's reading names the damage.
    chunk = folder / "c" / "0"
    chunk.write_bytes(chunk.read_bytes()[:-1])
    assert sm._raw_checkpoint(folder) is None
    with pytest.raises(sm.StoreError, match="checkpoint 1 of job 1"):
        Store(tmp_path / "s").read_checkpoint(1, 1, 3, digest)


def test_resuming_a_job_does_not_import_zarr_before_the_first_kernel_call(tmp_path):
    # The resume path reads the checkpoint as plain files; zarr (a few hundred
    # ms to import) is first imported by the helper thread, behind the kernel.
    import subprocess
    import sys

    from orbitledger.runner.ledger.operations import Ledger
    from orbitledger.runner.execution.worker import Worker
    from helpers import ROOT, small_spec

    led = Ledger(f"sqlite:///{tmp_path}/l.sqlite", tmp_path / "store")
    jid = led.submit(small_spec(length="300 yr"))
    Worker(led).run()
    led.extend(jid, 2 * led.job(jid)["total_steps"])  # queued again, with checkpoints
    assert led.job(jid)["status"] == "queued" and led.last_checkpoint(jid)["idx"] >= 1
    led.close()
    code = f"""
import sys, time
from orbitledger.runner.ledger.operations import Ledger
from orbitledger.runner.ledger import provenance
led = Ledger("sqlite:///{tmp_path}/l.sqlite", r"{tmp_path}/store")
c = led.claim("probe:1", now=time.time(), provenance=provenance.collect())
integ, ck = led.load_integrator(c.job_id, row=c.checkpoint)
print("zarr" in sys.modules, ck["idx"], integ.step)
"""
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                         cwd=ROOT, check=True).stdout.split()
    assert out[0] == "False"
    assert int(out[1]) >= 1 and int(out[2]) > 0


def test_checkpoint_metadata_written_by_prepare_is_the_file_zarr_writes(tmp_path):
    # Reproducibility against zarr itself: prepare writes a checkpoint array's
    # zarr.json as plain bytes; zarr's create_array for the same array must
    # give the same file, so that zarr (and xarray) read it as before.
    import zarr

    store = Store(tmp_path / "s")
    store.create_job(1, BODIES, capacity=4)
    state = {"x": np.arange(12.0).reshape(4, 3), "step": np.array([5]),
             "names": np.array(BODIES)}
    layout = state_layout(state)
    store.prepare(1, (1, 3, layout))
    ours = (store.job_path(1) / "checkpoints" / "00000001-3" / "zarr.json").read_bytes()
    nbytes = sum(e[4] for e in layout)
    g = zarr.open_group(str(tmp_path / "z"), mode="w")
    g.create_array("00000001-3", shape=(nbytes,), dtype="u1", chunks=(nbytes,),
                   compressors=None, dimension_names=["bytes_00000001-3"],
                   attributes={"layout": layout, "long_name": "exact integrator state, packed "
                               "bytes (arrays listed in layout)"})
    assert ours == (tmp_path / "z" / "00000001-3" / "zarr.json").read_bytes()
    digest = store.write_checkpoint(1, 1, 3, state)
    arr = zarr.open_array(str(store.job_path(1) / "checkpoints" / "00000001-3"), mode="r")
    assert arr.attrs["layout"] == layout and arr.shape == (nbytes,)
    assert Store(tmp_path / "s").read_checkpoint(1, 1, 3, digest)["x"].tobytes() \
        == state["x"].tobytes()


def test_arrays_kept_across_tokens_only_while_their_metadata_is_unchanged(tmp_path):
    # A member changes hands: this store writes under token 1, another store
    # (another worker) grows the arrays under token 2, this store writes
    # again under token 3. It must see the growth, and every row must land.
    rng = np.random.default_rng(11)
    mine = Store(tmp_path / "s")
    mine.create_job(1, BODIES, capacity=100)
    first = _block(rng, 0, 50)
    mine.write_samples(1, 0, first, fence=1)
    opened = mine._handles(1, 1)["samples"]["time"]
    mine.write_samples(1, 50, _block(rng, 50, 0), fence=2)  # nothing changed: kept
    assert mine._handles(1, 2)["samples"]["time"] is opened
    other = Store(tmp_path / "s")
    big = _block(rng, 50, 3 * defaults.SAMPLE_CHUNK)  # grows the arrays
    other.write_samples(1, 50, big, fence=3)
    last = _block(rng, 50 + len(big["time"]), 7)
    mine.write_samples(1, 50 + len(big["time"]), last, fence=4)
    assert mine._handles(1, 4)["samples"]["time"] is not opened
    n = 50 + len(big["time"]) + 7
    got = Store(tmp_path / "s").read_samples(1, n=n)
    want = _expected([first, big, last])
    for k in want:
        assert got[k].tobytes() == want[k].tobytes(), k
    # The store keeps at most KEPT_JOBS jobs' arrays.
    written = {}
    for j in range(2, Store.KEPT_JOBS + 5):
        mine.create_job(j, BODIES, capacity=10)
        written[j] = _block(rng, 0, 3)
        mine.write_samples(j, 0, written[j], fence=1)
    assert len(mine._open) <= Store.KEPT_JOBS
    # ...but the last chunks it wrote (each up to PARTICLE_CHUNK_BYTES) only for
    # the two jobs used last: memory does not grow with the members visited.
    tails = [h for k, h in mine._open.items() if isinstance(k, tuple) and h["tail"]]
    assert len(tails) == 2 and mine._handles(Store.KEPT_JOBS + 4, 1)["tail"]
    # A job whose cached chunk was dropped, written again under the same
    # token, reads its chunk back from the disk: every row lands.
    j = Store.KEPT_JOBS + 2
    assert not mine._open[("async", j)]["tail"]
    more = _block(rng, 3, 4)
    mine.write_samples(j, 3, more, fence=1)
    got = Store(tmp_path / "s").read_samples(j, n=7)
    want = _expected([written[j], more])
    for k in want:
        assert got[k].tobytes() == want[k].tobytes(), k
