"""The store's layout and metadata: the names, attributes and shapes of a job's
Zarr group (its sample series and checkpoint arrays), the group's creation,
the metadata files a writer opens, and the one-line errors for damaged
metadata. See :mod:`runner.store.zarr_store` for the layout itself."""

import asyncio
import json
import os

import numpy as np

from orbitledger.runner import defaults
from orbitledger.runner.errors import StoreError

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


def _template_key(body_names, capacity, indicator, particles):
    """What makes two new jobs' groups the same bytes: bodies, first size, optional arrays."""
    return (tuple(body_names), int(capacity), bool(indicator), tuple(particles))


def _new_folders(rels, existing):
    """Folders of the relative file paths `rels` not already made for the paths
    `existing`, parents first."""
    have = {d for rel in existing for d in _folders(rel)}
    new = {d for rel in rels for d in _folders(rel)} - have
    return sorted(new, key=lambda d: (d.count("/"), d))


def _folders(rel):
    """The folders above a relative file path ("a/b/c" -> "a", "a/b")."""
    parts = rel.split("/")[:-1]
    return ["/".join(parts[:k]) for k in range(1, len(parts) + 1)]


def _write_new(base, dirs, files):
    """Make new folders (parents first) and write new files under base, in place:
    a folder just created has nothing to replace atomically."""
    for rel in dirs:
        os.mkdir(base / rel)
    for rel, data in files:
        with open(base / rel, "wb") as fh:
            fh.write(data)


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
