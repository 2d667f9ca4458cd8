"""Shared test fixtures."""

from __future__ import annotations

from collections.abc import Iterator

import pytest
import torch


@pytest.fixture(scope="module")
def torch_one_thread() -> Iterator[None]:
    """Run a module's tiny nets on one thread: on a shared 2-core machine more intra-op threads only contend
    (measured here: 2 threads made tiny forward passes about 8x slower under load). Restored afterwards."""
    before = torch.get_num_threads()
    torch.set_num_threads(1)
    yield
    torch.set_num_threads(before)
