"""Run `qfit` with a gate at a named stage, for the signal tests.

    python tests/stage_gate.py STAGE MARKER -- qfit arguments...

STAGE is the role of a data pass ("calibration" or "evaluation"). After the first batch of that pass
has been handed to the model, the gate creates the file MARKER and waits there until a signal ends
the run, so a test can send SIGINT or SIGTERM in the middle of that stage on a machine of any speed.
Everything else is the real `qfit` command line: its own signal handlers, its own exit path.
"""
from __future__ import annotations

import os
import sys
import time

from qfit import cli
from qfit.data import DataFolder

GIVE_UP_S = 300  # only reached if the test never signals; the exit code then tells the test so


def main() -> int:
    stage, marker, separator, *args = sys.argv[1:]
    assert separator == "--", "usage: stage_gate.py STAGE MARKER -- qfit arguments..."
    real_batches = DataFolder.batches

    def gated_batches(self, *a, **k):
        for index, batch in enumerate(real_batches(self, *a, **k)):
            yield batch
            if index == 0 and self.role == stage:
                with open(marker, "w") as f:
                    f.write(stage)
                deadline = time.monotonic() + GIVE_UP_S
                while time.monotonic() < deadline:
                    time.sleep(0.01)  # the signal handler runs here and raises
                os._exit(3)

    DataFolder.batches = gated_batches
    return cli.main(args)


if __name__ == "__main__":
    sys.exit(main())
