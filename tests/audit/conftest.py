import pytest
import torch


@pytest.fixture(autouse=True)
def _single_thread():
    """The audit tests use tiny tensors: one intra-op thread avoids thread
    start-up and spin costs (large on a loaded machine); restored afterwards."""
    before = torch.get_num_threads()
    torch.set_num_threads(1)
    yield
    torch.set_num_threads(before)
