"""Child process for the SIGKILL tests: writes blobs until it is killed.

Run as `python -m tests.crash_writer VAULT SEED`; prints 'ready' once unlocked.
"""

from __future__ import annotations

import random
import sys

from tests.conftest import TEST_PASSPHRASE
from vault import Vault


def main(path: str, seed: int) -> None:
    rng = random.Random(seed)
    v = Vault.open(path, TEST_PASSPHRASE)
    pids = [r[0] for r in v._conn.execute("SELECT pid FROM participants")] or [v.new_participant()]
    print("ready", flush=True)
    while True:
        size = rng.choice([0, 1, 16384, 100_000, 1_500_000, 4_000_000])
        block = bytes([rng.randrange(256)]) * 65536
        chunks = [block[: min(65536, size - i)] for i in range(0, size, 65536)]
        if rng.random() < 0.2:
            pids.append(v.new_participant())
        v.put_blob(rng.choice(pids), "eeg", chunks)


if __name__ == "__main__":
    main(sys.argv[1], int(sys.argv[2]))
