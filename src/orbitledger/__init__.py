"""orbitledger: a job manager for long, checkpointed, bit-reproducible planetary integrations.

The installed distribution holds two packages under this name, kept in their
own folders in the repository:

- ``orbitledger.integrators`` (folder ``integrators/``): the numerical core,
  numpy and numba only;
- ``orbitledger.runner`` (folder ``runner/``): specs, the ledger, the store,
  workers, analysis, presentation and the command line.

The names most used from Python are available here directly, imported on
first use (``import orbitledger`` itself stays light). For analysis in a
notebook, ``ol.open_workspace("ledger")`` reads a campaign without writing to
it (docs/api.md). To run work::

    import orbitledger as ol
    spec = ol.load_spec("jobs/veyra-giants.toml")
    with ol.Ledger("sqlite:///ledger/ledger.sqlite", "ledger/store") as ledger:
        job = ledger.submit(spec)
        ol.Worker(ledger).run()
        print(ol.verify(ledger, job).ok)
"""

from importlib import import_module

__version__ = "0.1.0"

# name -> (module, attribute)
_API = {
    "System": ("orbitledger.integrators", "System"),
    "WisdomHolman": ("orbitledger.integrators", "WisdomHolman"),
    "Integrator": ("orbitledger.integrators", "Integrator"),
    "propagate": ("orbitledger.integrators", "propagate"),
    "load_spec": ("orbitledger.runner.inputs.spec", "load"),
    "resolve_spec": ("orbitledger.runner.inputs.spec", "resolve"),
    "Ledger": ("orbitledger.runner.ledger.operations", "Ledger"),
    "JobStatus": ("orbitledger.runner.ledger.status", "JobStatus"),
    "Store": ("orbitledger.runner.store.zarr_store", "Store"),
    "Worker": ("orbitledger.runner.execution.worker", "Worker"),
    "verify": ("orbitledger.runner.analysis.integrity", "verify"),
    "replay": ("orbitledger.runner.analysis.integrity", "replay"),
    "compare_jobs": ("orbitledger.runner.analysis.divergence", "compare_jobs"),
    "job_lyapunov": ("orbitledger.runner.analysis.lyapunov", "job_lyapunov"),
    "OrbitLedgerError": ("orbitledger.runner.errors", "OrbitLedgerError"),
    "open_workspace": ("orbitledger.runner.api", "open_workspace"),
    "Workspace": ("orbitledger.runner.api", "Workspace"),
}

__all__ = sorted(_API) + ["__version__"]


def __getattr__(name):
    if name in _API:
        module, attr = _API[name]
        value = getattr(import_module(module), attr)
        globals()[name] = value
        return value
    raise AttributeError(f"module 'orbitledger' has no attribute {name!r}")
