"""Child process for the SIGKILL tests of exports.

Run as `python -m tests.export_killer VAULT KIND OUT MODE N`:

- KIND `matrix`, `aggregate` or `eeg`.
- MODE `count`: export without interruption; print as JSON the number of steps taken and
  the step of each statement that moves the export's run to another state.
- MODE `step`: SIGKILL itself just before step N (1-based); a step is one SQL statement
  (SQLite's trace callback), one rename, unlink, mkdir or fsync. N past the last step: no kill.
"""

from __future__ import annotations

import datetime as dt
import json
import os
import signal
import sys

from tests.clock import ManualClock
from tests.conftest import TEST_PASSPHRASE
from vault import Vault

NOW = dt.datetime(2026, 6, 15, 12, 0, tzinfo=dt.UTC)
PURPOSE = {"matrix": "recommender-training", "aggregate": "recommender-training",
           "eeg": "primary-analysis"}


def main(path: str, kind: str, out: str, mode: str, n: int) -> None:
    v = Vault.open(path, TEST_PASSPHRASE, clock=ManualClock(NOW))
    steps = [0]
    marks: dict[str, int] = {}

    def step(sql: object = None, *_: object) -> None:
        steps[0] += 1
        if mode == "step" and steps[0] == n:
            os.kill(os.getpid(), signal.SIGKILL)
        text = str(sql or "")
        if text.startswith("INSERT INTO export_runs"):
            marks.setdefault("staged", steps[0])
        elif text.startswith("UPDATE export_runs SET state ="):
            name = ("settled" if "ended_at" in text else "signed" if ", signed =" in text
                    else "writing")
            marks.setdefault(name, steps[0])

    real = {name: getattr(os, name) for name in ("unlink", "replace", "fsync", "mkdir", "rename")}

    def hooked(name: str):
        def call(*args: object, **kwargs: object) -> object:
            step(None)
            return real[name](*args, **kwargs)
        return call

    for name in real:
        setattr(os, name, hooked(name))
    v._conn.set_trace_callback(step)
    if kind == "eeg":
        v.export_eeg(PURPOSE[kind], out)
    else:
        v.export_matrix(PURPOSE[kind], "ratings-explicit", out, epsilon=0.1,
                        release="aggregate" if kind == "aggregate" else "matrix")
    v._conn.set_trace_callback(None)
    for name, fn in real.items():
        setattr(os, name, fn)
    if mode == "count":
        print(json.dumps({"steps": steps[0], "marks": marks}), flush=True)
    v.close()


if __name__ == "__main__":
    main(sys.argv[1], sys.argv[2], sys.argv[3], sys.argv[4], int(sys.argv[5]))
