"""Checkpoint arrays: an integrator's state arrays packed into one uint8 blob with
its layout, the state's and a sample block's SHA-256, and a checkpoint read
back as plain files (the resume path, without importing zarr)."""

import hashlib
import json

import numpy as np

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
