"""The scripts in examples/ run as documented (small settings)."""

import os
import subprocess
import sys
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
ENV = {**os.environ, "PYTHONPATH": os.pathsep.join([str(ROOT), os.environ.get("PYTHONPATH", "")])}


def test_torchrun_example_keeps_codebooks_identical_on_two_ranks():
    done = subprocess.run(
        [sys.executable, "-m", "torch.distributed.run", "--standalone", "--nproc_per_node", "2"]
        + [str(ROOT / "examples" / "torchrun_codec.py"), "--steps", "8", "--batch", "64", "--timeout", "60"],
        capture_output=True,
        text=True,
        timeout=240,
        cwd=ROOT,
        env=ENV,
    )
    assert done.returncode == 0, done.stdout + done.stderr
    assert "ranks 2, steps 8" in done.stdout
    assert "codebooks identical on every rank" in done.stdout
