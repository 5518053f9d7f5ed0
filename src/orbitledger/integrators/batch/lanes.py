"""The batched kernel's memory layout: the most lanes per call, the flat scratch
arrays' rows, and LLVM's limit on run-time overlap checks (see the package)."""

import llvmlite.binding as _llvm

# A lane loop reads and writes many rows of several arrays; LLVM vectorizes
# it behind run-time checks that the arrays do not overlap, and by default
# gives up beyond a small number of checks (measured: a loop with 7 read and
# 11 written rows stayed scalar). Raising the limit only lets more loops take
# the vector path; it changes no operation, so no bits (a vector loop here
# does per lane what the scalar one does; no reduction of floating-point
# values is reordered without fast-math). It is set process-wide before the
# package's kernels are compiled.
_llvm.set_option("", "-vectorize-memory-check-threshold=1024")

# Most lanes in one kernel call, and the distance in elements between two
# rows of the flat scratch arrays: a compile-time constant, so that LLVM sees
# the rows of one array cannot overlap within a loop over the lanes and
# vectorizes it without run-time checks between them.
_PITCH = 64

# Rows of the per-lane scratch array of the drift.
_R0, _IR0, _ETA, _BETA, _DT, _ZETA, _S, _LO, _HI, _DSP, _ST = range(11)
_RR, _G0, _G1, _G2, _Y, _NQ, _C0, _C1, _C2, _C3 = range(11, 21)
N_DRIFT_ROWS = 21
# Rows of the per-lane scratch array of the step (besides the drift's).
_H, _A0, _A1, _A2, _FLAG, _Q = range(6)
N_STEP_ROWS = 6
