"""Child process for the SIGKILL tests of `withdraw process`.

Run as `python -m tests.withdraw_killer VAULT TARGET MODE N`:

- MODE `count`: process TARGET without interruption; print the number of steps taken.
- MODE `step`: SIGKILL itself just before step N (1-based); a step is one SQL statement
  (SQLite's trace callback), one file rename, unlink or fsync. N past the last step: no kill.
- MODE `time`: print 'ready' once the vault is open, then process (the parent kills us).
"""

from __future__ import annotations

import datetime as dt
import os
import signal
import sys

from tests.clock import ManualClock, at, ctx_at
from tests.conftest import TEST_PASSPHRASE
from vault import Vault
from vault.services import withdraw

NOW = dt.datetime(2026, 6, 15, 12, 0, tzinfo=dt.UTC)


def main(path: str, target: str, mode: str, n: int) -> None:
    v = Vault.open(path, TEST_PASSPHRASE, clock=ManualClock(NOW))
    steps = [0]

    def step(*_: object) -> None:
        steps[0] += 1
        if mode == "step" and steps[0] == n:
            os.kill(os.getpid(), signal.SIGKILL)

    if mode in ("count", "step"):
        real_unlink, real_replace, real_fsync = os.unlink, os.replace, os.fsync

        def unlink(*args: object, **kwargs: object) -> None:
            step()
            real_unlink(*args, **kwargs)  # type: ignore[arg-type]

        def replace(*args: object, **kwargs: object) -> None:
            step()
            real_replace(*args, **kwargs)  # type: ignore[arg-type]

        def fsync(fd: int) -> None:
            step()
            real_fsync(fd)

        os.unlink, os.replace, os.fsync = unlink, replace, fsync  # type: ignore[assignment]
        v._conn.set_trace_callback(step)
    else:
        print("ready", flush=True)
    withdraw.process(ctx_at(v, NOW), target)
    v._conn.set_trace_callback(None)
    if mode == "count":
        print(steps[0], flush=True)
    at(v, NOW).close()


if __name__ == "__main__":
    main(sys.argv[1], sys.argv[2], sys.argv[3], int(sys.argv[4]))
