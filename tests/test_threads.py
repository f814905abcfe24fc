"""factorize.threads.torch_threads: the one way torch's process-wide thread count is pinned and restored."""

from __future__ import annotations

import pytest
import torch

from factorize.threads import torch_threads


def test_the_count_is_set_inside_and_restored_after():
    before = torch.get_num_threads()
    other = 1 if before != 1 else 2
    with torch_threads(other):
        assert torch.get_num_threads() == other
    assert torch.get_num_threads() == before


def test_restored_after_an_error_and_none_changes_nothing():
    before = torch.get_num_threads()
    other = 1 if before != 1 else 2
    with pytest.raises(RuntimeError), torch_threads(other):
        raise RuntimeError("inside")
    assert torch.get_num_threads() == before
    with torch_threads(None):
        assert torch.get_num_threads() == before
