# ---
# jupyter:
#   jupytext:
#     formats: py:percent
#     text_representation:
#       extension: .py
#       format_name: percent
# ---

# %% [markdown]
# # A small stability campaign, from a notebook
#
# This tutorial submits an ensemble of clones of an invented, tightly packed
# system (the star Ilvar with five planets, one squeezed into the widest
# gap; all numbers made up), works it on this machine, and analyses it
# through `orbitledger`'s analysis API. It is a plain Python file in
# jupytext's "percent" format: open it as a notebook with jupytext, or run
# it as a script (`python docs/tutorial.py`; the test suite does, and fails
# if any cell fails). It takes about a minute.
#
# The clones differ in one planet's semi-major axis by parts in 10^9. The
# system is chaotic, so each clone's history is one sample of what the
# system may do: the answer is the ensemble's statistics, not any member.

# %%
import os
import tempfile
from pathlib import Path

import matplotlib

matplotlib.use(os.environ.get("MPLBACKEND", "Agg"))
import matplotlib.pyplot as plt  # noqa: E402

import orbitledger as ol  # noqa: E402
from orbitledger.runner.inputs.spec import load_text  # noqa: E402
from orbitledger.runner.ledger.workspace import init  # noqa: E402

HERE = Path(__file__).resolve().parent if "__file__" in globals() else Path("docs").resolve()
OUT = Path(os.environ.get("TUTORIAL_OUT") or tempfile.mkdtemp(prefix="orbitledger-tutorial-"))
print("working in", OUT)

# %% [markdown]
# ## Submit the ensemble
#
# The shipped example `jobs/ilvar-ensemble.toml` runs 16 clones for 3000
# years; here 8 clones for 1500 years, so that the tutorial stays short.

# %%
text = (HERE.parent / "jobs" / "ilvar-ensemble.toml").read_text()
text = text.replace("members = 16", "members = 8").replace('length = "3000 yr"',
                                                          'length = "1500 yr"')
spec = load_text(text)
folder, ledger = init(OUT / "ledger")
ensemble_id, members = ledger.submit_ensemble(spec)
print(f"ensemble {ensemble_id}: jobs {members}")

# %% [markdown]
# ## Work it
#
# One worker in this process, members in batches (the batched kernel gives
# every member the bytes it would get alone). On a cluster the same ledger
# would be worked by `orbitledger work` or `orbitledger batch` (SLURM).

# %%
ol.Worker(ledger).run()
ledger.close()

# %% [markdown]
# ## Analyse it, read-only
#
# `open_workspace` opens the ledger with a connection that cannot write, so
# a notebook can watch a campaign while workers commit.

# %%
ws = ol.open_workspace(folder)
jobs = ws.jobs()
print(jobs[["name", "state", "progress", "time_reached_yr", "max_energy_error", "outcome"]])

# %% [markdown]
# The energy error of one member over its run. A bounded error says the map
# is working; it says nothing about whether the orbital phases are right.

# %%
ds = ws.job(members[0]).samples()
fig, ax = plt.subplots(figsize=(6, 3))
ax.plot(ds.time_yr, ds.energy_error)
ax.set_xlabel("time (yr)")
ax.set_ylabel("relative energy error")
fig.tight_layout()
fig.savefig(OUT / "energy.png")

# %% [markdown]
# The squeezed planet's eccentricity in every member: identical at first,
# then apart (chaos), until some members meet a close encounter and stop
# (a symplectic map is not accurate through one, so the spec stops them).

# %%
fig, ax = plt.subplots(figsize=(6, 3))
for j in members:
    s = ws.job(j).samples()
    ax.plot(s.time_yr, s.elements.sel(body="Ilvar x", element="e"), lw=0.8)
ax.set_xlabel("time (yr)")
ax.set_ylabel("e of Ilvar x")
fig.tight_layout()
fig.savefig(OUT / "eccentricity.png")

# %% [markdown]
# ## The ensemble's answer
#
# The instability fraction with its Wilson interval, and the survival curve
# (Kaplan-Meier; members still running or finished are censored) with its
# pointwise band.

# %%
out = ws.ensemble(ensemble_id).outcomes()
lo, hi = out.fraction_interval
print(f"{out.unstable} of {out.n} members unstable: {out.fraction:.2f} "
      f"(95% Wilson interval {lo:.2f}-{hi:.2f})")
print(out.members)
fig, ax = plt.subplots(figsize=(6, 3))
# The curve starts at 1 at time 0 and steps down at each instability.
t = [0.0] + list(out.survival.time_yr) + [float(out.members.time_yr.max())]
surv = [1.0] + list(out.survival.survival) + [out.survival.survival.iloc[-1] if len(out.survival)
                                              else 1.0]
ax.step(t, surv, where="post")
if len(out.survival):
    ax.fill_between(out.survival.time_yr, out.survival.low, out.survival.high, step="post",
                    alpha=0.3, label="95% pointwise band")
    ax.legend()
ax.set_ylim(0, 1.05)
ax.set_xlabel("time (yr)")
ax.set_ylabel("fraction surviving")
fig.tight_layout()
fig.savefig(OUT / "survival.png")

# %% [markdown]
# Every committed checkpoint and sample can be checked against the hash the
# ledger recorded when it was committed, and the error budgets audited. The
# audit fits the sampled errors' growth; a member stopped at a close
# encounter also has a larger error at its stopping step (the jobs table's
# `max_energy_error` includes it): the map is not accurate through an
# encounter, which is why the spec stops members there.

# %%
assert all(ws.job(j).verify().ok for j in members)
survivor = next((j for j in members if jobs.loc[j, "state"] == "done"), members[0])
for v in ws.job(survivor).audit():
    print(f"job {survivor}:", v.quantity, f"max {v.max_error:.2e}", v.verdict)
ws.close()
