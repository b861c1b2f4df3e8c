"""Suite-wide settings."""

import pytest
import torch


@pytest.fixture(autouse=True, scope="session")
def _one_thread():
    """Run the suite on one intra-op thread, then restore the setting.

    The tests are loops of small tensor steps; on a 2-core machine that is busy
    with anything else, a second intra-op thread makes each small matmul wait
    for a time slice (measured: 1 ms per training step on one thread, 17 ms on
    two). Results do not depend on it.
    """
    before = torch.get_num_threads()
    torch.set_num_threads(1)
    yield
    torch.set_num_threads(before)
