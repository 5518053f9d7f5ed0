"""The hash chain of a job's checkpoints (no numpy, no zarr: the ledger's
light paths, such as `status`, import it without the store)."""

import hashlib


def chain_sha256(previous, state_hash, samples_hash):
    """Hash-chain link: covers the previous link, this state and this chunk's samples."""
    return hashlib.sha256(f"{previous}:{state_hash}:{samples_hash}".encode()).hexdigest()
