"""Streaming ensemble prediction and snapshot files."""

import pytest
import torch
from torch import nn

from holonomic.sampling import PredictiveEnsemble, load_snapshot, predict_from_snapshots


def _noisy_sgd_run(ensemble, model, steps, seed=0):
    """Noisy gradient descent on a tiny classification problem (invented data from a seed)."""
    gen = torch.Generator().manual_seed(seed)
    x = torch.randn(32, 5, generator=gen)
    y = torch.randint(0, 3, (32,), generator=gen)
    for _ in range(steps):
        model.zero_grad()
        nn.functional.cross_entropy(model(x), y).backward()
        with torch.no_grad():
            for p in model.parameters():
                p.add_(-0.1 * p.grad + 0.05 * torch.randn(p.shape, generator=gen))
        ensemble.observe()


def _model():
    torch.manual_seed(0)
    return nn.Sequential(nn.Linear(5, 8), nn.Tanh(), nn.Dropout(0.5), nn.Linear(8, 3))


def test_streaming_average_equals_average_over_snapshots(tmp_path):
    model = _model()
    inputs = torch.randn(20, 5, generator=torch.Generator().manual_seed(1))
    ens = PredictiveEnsemble(model, inputs, burn_in=5, every=3, snapshot_dir=tmp_path,
                             batch_size=7)
    _noisy_sgd_run(ens, model, steps=40)
    assert ens.num_samples == (40 - 5) // 3
    assert len(ens.snapshot_paths) == ens.num_samples
    stored = predict_from_snapshots(model, ens.snapshot_paths, inputs)
    torch.testing.assert_close(ens.mean_probs(), stored, rtol=0, atol=1e-14)
    assert model.training  # evaluation restored the training mode
    # the average is a distribution and differs from the last network alone
    torch.testing.assert_close(ens.mean_probs().sum(1), torch.ones(20, dtype=torch.float64))


def test_snapshot_schedule_and_files_load_with_weights_only(tmp_path):
    model = _model()
    inputs = torch.randn(4, 5)
    ens = PredictiveEnsemble(model, inputs, burn_in=3, every=2, snapshot_dir=tmp_path / "s",
                             snapshot_every=2)
    collected = []
    for t in range(1, 11):
        with torch.no_grad():
            model[0].weight.add_(1.0)
        if ens.observe():
            collected.append(t)
            if ens.num_samples == 2:
                expected = model[0].weight.detach().clone()
    assert collected == [5, 7, 9]  # after burn-in 3, every 2 steps
    assert [p.name for p in ens.snapshot_paths] == ["sample_000002.pt"]
    state = torch.load(ens.snapshot_paths[0], weights_only=True)
    torch.testing.assert_close(state["0.weight"], expected)
    assert load_snapshot(ens.snapshot_paths[0]).keys() == model.state_dict().keys()


def test_state_dict_round_trip_resumes_the_average():
    model = _model()
    inputs = torch.randn(6, 5)
    full = PredictiveEnsemble(model, inputs, burn_in=2, every=1)
    _noisy_sgd_run(full, model, steps=6, seed=3)
    saved = full.state_dict()
    resumed = PredictiveEnsemble(model, inputs, burn_in=2, every=1)
    resumed.load_state_dict(saved)
    _noisy_sgd_run(full, model, steps=1, seed=4)
    resumed.collect()  # same weights as full's last sample
    torch.testing.assert_close(full.mean_probs(), resumed.mean_probs(), rtol=0, atol=1e-15)


def test_constructor_validation():
    model = _model()
    with pytest.raises(ValueError, match="every"):
        PredictiveEnsemble(model, torch.randn(3, 5), every=0)
    with pytest.raises(ValueError, match="burn_in"):
        PredictiveEnsemble(model, torch.randn(3, 5), burn_in=-1)
    with pytest.raises(ValueError, match="inputs"):
        PredictiveEnsemble(model, [1, 2])
    with pytest.raises(RuntimeError, match="no samples"):
        PredictiveEnsemble(model, torch.randn(3, 5)).mean_probs()
