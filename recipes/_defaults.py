"""Default settings of each recipe (one place, read by the recipes and by ``--help``).

``code_dim`` None means the quantizer's input size (no projection).
"""

from __future__ import annotations

DEFAULTS = {
    "tones": {"stages": 8, "entries": 256, "code_dim": 32, "steps": 1500, "batch_size": 12},
    "digits": {"stages": 4, "entries": 64, "code_dim": 32, "steps": 3000, "batch_size": 128},
    "embeddings": {"stages": 6, "entries": 128, "code_dim": None, "steps": 240, "batch_size": 1024},
    "speech": {"stages": 8, "entries": 256, "code_dim": 32, "steps": 1200, "batch_size": 12},
}
QUICK = {
    "tones": {"steps": 120, "batch_size": 8},
    "digits": {"steps": 300},
    "embeddings": {"steps": 60},
    "speech": {"steps": 60, "batch_size": 8},
}


def describe(name: str) -> str:
    """One line of defaults for ``--help``."""
    d = DEFAULTS[name]
    code_dim = "input size" if d["code_dim"] is None else d["code_dim"]
    quick = ", ".join(f"{k.replace('_', '-')} {v}" for k, v in QUICK[name].items())
    return (
        f"{name}: stages {d['stages']}, entries {d['entries']}, code-dim {code_dim}, steps {d['steps']}, "
        f"batch-size {d['batch_size']} (--quick: {quick})"
    )
