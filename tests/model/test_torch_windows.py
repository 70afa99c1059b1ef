"""The torch Dataset over stored windows works with torch's own DataLoader and gives what ``Windows.batch`` gives.

Reference library: ``torch.utils.data`` (docs/references.md#lib-torch; Dataset, DataLoader; a dataset's
``__getitems__`` is called with a whole list of indices by the DataLoader's fetcher when present, documented
in torch's source [S]). The reference for the content is the numpy window builder
``wmplan.data.windows.Windows.batch``.
"""

from __future__ import annotations

import numpy as np
import torch

from wmplan.data.windows import Windows, WindowSpec, anchor_index, torch_windows
from wmplan.model.train import to_torch

FIELDS = ("history", "future", "road", "actions", "ego_speed_mps", "ego_steer_rad")


def _assert_batch_equal(got: dict, want) -> None:
    assert set(got) == set(FIELDS)
    for k in FIELDS:
        ref = torch.from_numpy(getattr(want, k)) if not isinstance(want, dict) else want[k]
        assert got[k].dtype == ref.dtype == torch.float32, k
        assert torch.equal(got[k], ref), k


def test_is_a_torch_dataset_equal_to_windows_batch(dataset):
    """``__len__`` is the number of anchors, ``__getitems__`` returns the dict of tensors of ``Windows.batch`` for
    the same (episode, anchor) pairs (identical values), ``__getitem__`` one window of it; ``to_torch`` (what
    training uses) gives the same dict."""
    spec = WindowSpec(5, 15, 8)
    index = anchor_index(dataset, spec, stride=2)
    ds = torch_windows(dataset, spec, index)
    assert isinstance(ds, torch.utils.data.Dataset)
    assert len(ds) == len(index)
    items = [0, 7, 3, len(index) - 1]
    want = Windows(dataset, spec).batch(index[items])
    got = ds.__getitems__(items)
    _assert_batch_equal(got, want)
    _assert_batch_equal(got, to_torch(want))
    assert got["history"].shape == (4, 5, 9, 8) and got["future"].shape == (4, 15, 9, 8)
    one = ds[7]
    for k in FIELDS:
        assert torch.equal(one[k], got[k][1]), k


def test_works_with_dataloader(dataset):
    """``DataLoader(ds, batch_size=8, collate_fn=lambda x: x)`` yields the batches of ``Windows.batch`` in order
    (and the last, shorter one); with a seeded shuffling generator it covers every window exactly once."""
    spec = WindowSpec(5, 15, 8)
    index = anchor_index(dataset, spec, stride=3)[:45]
    ds = torch_windows(dataset, spec, index)
    windows = Windows(dataset, spec)
    batches = list(torch.utils.data.DataLoader(ds, batch_size=8, collate_fn=lambda x: x))
    assert [b["history"].shape[0] for b in batches] == [8, 8, 8, 8, 8, 5]
    for i, b in enumerate(batches):
        _assert_batch_equal(b, windows.batch(index[8 * i : 8 * i + 8]))
    loader = torch.utils.data.DataLoader(
        ds, batch_size=8, shuffle=True, collate_fn=lambda x: x, generator=torch.Generator().manual_seed(3)
    )
    speeds = torch.cat([b["ego_speed_mps"] for b in loader]).numpy()
    np.testing.assert_array_equal(np.sort(speeds), np.sort(windows.batch(index).ego_speed_mps))


def test_window_cache_gathers_what_the_builder_builds(dataset):
    """Training keeps its windows in a ``WindowCache`` built in chunks; a batch gathered from it at any positions
    (repeats included) holds the same values as building those windows directly, and the memory estimate that
    decides whether to cache equals what the cache holds."""
    from wmplan.model.train import WindowCache

    spec = WindowSpec(5, 15, 8)
    index = anchor_index(dataset, spec)
    windows = Windows(dataset, spec)
    cache = WindowCache(windows, index, chunk=97)  # chunks that do not divide the index
    pos = np.random.default_rng(3).integers(0, len(index), 300)
    _assert_batch_equal(cache.batch(pos), to_torch(windows.batch(index[pos])))
    held = sum(v.numel() * v.element_size() for v in cache.tensors.values())
    assert WindowCache.nbytes(spec, len(index)) == held
