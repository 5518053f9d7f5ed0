"""A live line per worker of a pool (`work --workers N` in a terminal).

The pool's parent process reads the ledger (read-only) about once a second
and shows, for each of its worker processes, what that worker holds now: the
job, or the batch of ensemble members, the simulated time reached of the time
wanted, the rate and the time to finish. The ledger is the source: the
workers need no channel to the parent, and the lines say what is committed.
"""

import socket
import threading

from rich.live import Live
from rich.table import Table

from orbitledger.runner.inputs.text import format_time
from orbitledger.runner.presentation.tables import format_duration, format_rate, time_to_finish


def worker_lines(running, owners):
    """One dict per owner (in the given order): its jobs and the least advanced
    member's progress. `running`: job rows in the running state."""
    held = {o: [] for o in owners}
    for r in running:
        if r["owner"] in held:
            held[r["owner"]].append(r)
    lines = []
    for owner, rows in held.items():
        if not rows:
            lines.append({"owner": owner, "what": "-", "reached": "", "rate": "",
                          "finish": ""})
            continue
        rows.sort(key=lambda r: r["id"])
        slow = min(rows, key=lambda r: abs(r["steps_done"] * r["dt"]))
        if len(rows) == 1:
            what = f"job {slow['id']} {slow['name']}"
        else:
            what = (f"jobs {rows[0]['id']}-{rows[-1]['id']} ({len(rows)} members of "
                    f"ensemble {slow['ensemble_id']})")
        ends = [time_to_finish(r) for r in rows]
        lines.append({
            "owner": owner, "what": what,
            "reached": (f"{format_time(abs(slow['steps_done'] * slow['dt']))} of "
                        f"{format_time(max(abs(r['total_steps'] * r['dt']) for r in rows))}"),
            "rate": format_rate(slow["rate"]),
            "finish": format_duration(None if None in ends else max(ends))})
    return lines


def lines_table(lines):
    t = Table(title="Workers", title_justify="left", box=None, pad_edge=False)
    for name, just in (("worker", "left"), ("holds", "left"), ("reached", "right"),
                       ("rate", "right"), ("to finish", "right")):
        t.add_column(name, justify=just)
    for x in lines:
        t.add_row(x["owner"], x["what"], x["reached"], x["rate"], x["finish"])
    return t


class PoolLines:
    """A thread showing the pool's lines on `console` until stopped."""

    def __init__(self, url, store_root, console, every=1.0):
        self.url, self.store_root, self.console, self.every = url, store_root, console, every
        self.owners = []
        self._stop = threading.Event()
        self._thread = threading.Thread(target=self._run, name="pool-lines", daemon=True)

    def add_worker(self, pid):
        """A worker process of the pool (its lease owner is host:pid)."""
        self.owners.append(f"{socket.gethostname()}:{pid}")

    def start(self):
        self._thread.start()

    def stop(self):
        self._stop.set()
        self._thread.join(timeout=10)

    def _run(self):
        from orbitledger.runner.ledger.operations import Ledger

        try:
            ledger = Ledger(self.url, self.store_root, read_only=True)
        except Exception:  # noqa: BLE001 - a display only: the workers carry on without it
            return
        with ledger, Live(console=self.console, refresh_per_second=2, transient=False) as live:
            while True:
                try:
                    running = ledger.jobs(status="running")
                except Exception:  # noqa: BLE001 - a busy or restarting database: try again
                    running = None
                if running is not None:
                    live.update(lines_table(worker_lines(running, list(self.owners))))
                if self._stop.wait(self.every):
                    break
