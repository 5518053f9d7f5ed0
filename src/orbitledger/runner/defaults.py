"""Defaults of the runner, in one place."""

# Environment variable naming the workspace folder.
ENV_WORKSPACE = "ORBITLEDGER_WORKSPACE"
# Environment variable holding a database URL (overrides the workspace's SQLite file).
ENV_DB = "ORBITLEDGER_DB"
# Workspace folder used when neither option nor environment names one.
DEFAULT_WORKSPACE = "ledger"
# SQLite file name inside the workspace.
SQLITE_NAME = "ledger.sqlite"
# Checkpoint store folder inside the workspace.
STORE_NAME = "store"
# SQLite busy timeout, milliseconds.
SQLITE_BUSY_MS = 30_000
# Lease length a claim or heartbeat grants, seconds.
LEASE_SECONDS = 60.0
# How long `work` waits for a ledger database that went away (a restart, a cut
# connection, a long lock) before it stops with one line.
DB_WAIT_SECONDS = 300.0
# Heartbeat interval, seconds (well inside the lease).
HEARTBEAT_SECONDS = 10.0
# Most steps one kernel call takes before the worker looks at clocks and signals.
MAX_STEPS_PER_CALL = 50_000
# Wall time one kernel call aims at (fewer steps for large systems), seconds:
# signals, hold and cancel requests are seen within about this long.
SLICE_SECONDS = 0.5
# Members of one ensemble a worker claims and advances together with the
# batched kernel (integrators/batch/); 1 runs every member alone. Measured
# (docs/benchmarks.md, "Batched members"): the batch's speed-up grows with its
# size (8 lanes 1.6-1.8x the scalar kernel, 32 lanes 2.8-3.0x) and little beyond.
BATCH_LANES = 32
# Most bytes of one chunk's samples a batch holds for all its members at once
# (a batch of members whose chunks hold many samples is made smaller), so a
# worker's memory stays bounded whatever the plan (measured: 419 MB peak on
# the heaviest accepted plan; 532 MB at twice this; docs/benchmarks.md).
BATCH_SAMPLE_BYTES = 96_000_000
# Output cadence when a spec gives none, steps.
DEFAULT_OUTPUT_STEPS = 1_000
# Chunk (checkpoint interval) when a spec gives none, in outputs.
DEFAULT_CHUNK_OUTPUTS = 1_000
# Most bytes of samples one chunk may hold in a worker's memory before its
# checkpoint writes them (refused at submit above this): keeps a worker's
# memory bounded whatever the plan.
MAX_CHUNK_SAMPLE_BYTES = 64_000_000
# A chunk whose samples are at most this many bytes is committed on the
# worker's helper thread while the kernel goes on (the next chunk, or the next
# member of an ensemble); a larger one is committed before the kernel resumes,
# so at most one small copy is ever in flight and memory stays bounded.
OVERLAP_COMMIT_BYTES = 8_000_000
# Samples per Zarr chunk along the sample dimension.
SAMPLE_CHUNK = 1_024
# A worker is one thread of compute (the kernel takes no threads), so the
# numerical libraries' thread pools are kept to one thread in `work` and its
# pool's workers unless the user sets these: a BLAS thread spinning after a
# small matrix operation takes CPU from the other workers' kernels.
ONE_THREAD_ENV = ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS")
# Exit code of `work` when work remains (stopped by signal or deadline).
EXIT_WORK_REMAINS = 3
# Exit code of `work` when a worker failed.
EXIT_FAILED = 1
# Largest spec file accepted, bytes.
MAX_SPEC_BYTES = 1_000_000
# Most bodies in one system.
MAX_BODIES = 1_000
# Most test particles in one job.
MAX_PARTICLES = 100_000
# Bytes of one Zarr chunk of the particles' sampled elements (its rows follow).
PARTICLE_CHUNK_BYTES = 4_000_000
# `status` lists every job up to this many; above it, one row per ensemble.
STATUS_LIST_MAX = 40
