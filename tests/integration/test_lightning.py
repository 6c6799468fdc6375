"""PyTorch Lightning as a real client (issue 16, item 7).

``configure_optimizers`` returns ``holonomic.Langevin`` with a ``StepLR`` scheduler; a run
resumed from a Lightning checkpoint must end with the same weights, bit for bit, as an
uninterrupted one (at temperature > 0, so the generator state travels too), and the
learning-rate finder must run.  Data: scikit-learn's bundled breast-cancer data set
(``sklearn.datasets.load_breast_cancer``), standardised.  Kept small (< 20 s).
"""

import logging
import warnings

import pytest
import torch
from torch import nn
from torch.utils.data import DataLoader, TensorDataset

pl = pytest.importorskip("lightning.pytorch")
from lightning.pytorch.tuner import Tuner  # noqa: E402
from sklearn.datasets import load_breast_cancer  # noqa: E402
from sklearn.preprocessing import StandardScaler  # noqa: E402

import holonomic as hn  # noqa: E402

pytestmark = pytest.mark.slow


class Model(pl.LightningModule):
    def __init__(self, lr: float = 0.05, constrained: bool = True) -> None:
        super().__init__()
        self.lr = lr
        self.net = nn.Sequential(nn.Linear(30, 8), nn.Tanh(), nn.Linear(8, 2))
        if constrained:
            hn.constrain(self.net, **{"0.weight": hn.FixedNorm()})
        self.steps_taken = 0

    def training_step(self, batch, batch_idx):
        x, y = batch
        return nn.functional.cross_entropy(self.net(x), y)

    def configure_optimizers(self):
        opt = hn.Langevin(self.parameters(), lr=self.lr, momentum=0.9, temperature=1e-4, seed=3)
        opt.register_step_post_hook(self._count)
        return {"optimizer": opt, "lr_scheduler": torch.optim.lr_scheduler.StepLR(opt, step_size=1, gamma=0.5)}

    def _count(self, optimizer, args, kwargs) -> None:
        self.steps_taken += 1


def _loader():
    x, y = load_breast_cancer(return_X_y=True)
    x = torch.tensor(StandardScaler().fit_transform(x), dtype=torch.float32)
    return DataLoader(TensorDataset(x, torch.tensor(y)), batch_size=64, shuffle=False)


def _trainer(tmp_path, epochs, **kwargs):
    return pl.Trainer(max_epochs=epochs, accelerator="cpu", logger=False, enable_checkpointing=True,
                      enable_progress_bar=False, enable_model_summary=False, default_root_dir=tmp_path,
                      **kwargs)


def _model(**kwargs):
    torch.manual_seed(0)
    return Model(**kwargs)


@pytest.fixture(autouse=True)
def _quiet():
    logging.getLogger("lightning.pytorch").setLevel(logging.ERROR)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # "the dataloader does not have many workers", ...
        yield


def test_resume_from_checkpoint_is_bit_identical(tmp_path):
    full = _model()
    trainer = _trainer(tmp_path / "full", 2)
    trainer.fit(full, _loader())
    assert full.optimizers().optimizer.param_groups[0]["lr"] == 0.05 * 0.5 ** 2  # StepLR scaled SGD's lr
    # one post hook call per optimizer step (register_step_post_hook)
    assert full.steps_taken == trainer.global_step == 2 * len(_loader())

    first = _model()
    _trainer(tmp_path / "first", 1).fit(first, _loader())
    path = tmp_path / "epoch1.ckpt"
    first.trainer.save_checkpoint(path)
    resumed = _model()
    _trainer(tmp_path / "resumed", 2).fit(resumed, _loader(), ckpt_path=path)
    for a, b in zip(full.parameters(), resumed.parameters()):
        assert torch.equal(a, b)
    assert max(hn.residuals(resumed.net).values()) < 1e-5


def test_learning_rate_finder_runs(tmp_path):
    # the whole sweep up to max_lr (no early stop), 24 steps over 3 epochs of 9 batches
    model = _model()
    trainer = _trainer(tmp_path, 3)
    finder = Tuner(trainer).lr_find(model, train_dataloaders=_loader(), min_lr=1e-4, max_lr=1.0,
                                    num_training=24, early_stop_threshold=None)
    assert len(finder.results["lr"]) == 24
    assert finder.results["lr"][-1] == pytest.approx(1.0)
    suggestion = finder.suggestion()
    assert suggestion is not None and 1e-4 <= suggestion <= 1.0
    assert model.lr == suggestion  # written back to the model (update_attr)
