"""skorch as a real client (issue 16, item 7).

skorch builds its optimizer as ``optimizer(params, lr=net.lr, **optimizer__kwargs)``, as every
framework does, so ``holonomic.Langevin`` must take ``lr`` with SGD's meaning.  Data:
scikit-learn's bundled breast-cancer data set (``sklearn.datasets.load_breast_cancer``,
Wolberg, Street & Mangasarian, UCI), standardised.  Kept small: a few epochs of a tiny
network, well under 20 s.
"""

import pickle

import numpy as np
import pytest
import torch
from torch import nn

skorch = pytest.importorskip("skorch")
from sklearn.datasets import load_breast_cancer  # noqa: E402
from sklearn.model_selection import GridSearchCV  # noqa: E402
from sklearn.preprocessing import StandardScaler  # noqa: E402

import holonomic as hn  # noqa: E402

pytestmark = pytest.mark.slow


class Classifier(nn.Module):
    """30 features -> 16 hidden units on fixed-norm rows -> 2 logits."""

    def __init__(self, hidden: int = 16) -> None:
        super().__init__()
        self.hidden = nn.Linear(30, hidden)
        self.out = nn.Linear(hidden, 2)
        hn.constrain(self, **{"hidden.weight": hn.FixedNorm()})

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        return self.out(torch.tanh(self.hidden(x)))


def _data():
    x, y = load_breast_cancer(return_X_y=True)
    return StandardScaler().fit_transform(x).astype(np.float32), y.astype(np.int64)


def _net(**kwargs):
    settings = dict(module=Classifier, criterion=nn.CrossEntropyLoss, optimizer=hn.Langevin, lr=0.05,
                    optimizer__momentum=0.9, max_epochs=3, batch_size=64, train_split=None,
                    iterator_train__shuffle=False, verbose=0)
    settings.update(kwargs)
    torch.manual_seed(0)
    return skorch.NeuralNetClassifier(**settings)


def test_fit_with_lr_and_momentum_keeps_the_constraint():
    x, y = _data()
    net = _net().fit(x, y)
    group = net.optimizer_.param_groups[0]
    assert group["lr"] == 0.05 and group["momentum"] == 0.9
    assert max(hn.residuals(net.module_).values()) < 1e-5
    losses = net.history[:, "train_loss"]
    assert losses[-1] < losses[0]
    assert (net.predict(x) == y).mean() > 0.9  # a separable-ish data set: common practice, no source
    net.set_params(lr=0.01)  # skorch re-creates the optimizer with the new lr
    assert net.optimizer_.param_groups[0]["lr"] == 0.01


def test_grid_search_over_temperature():
    x, y = _data()
    search = GridSearchCV(_net(max_epochs=2), {"optimizer__temperature": [0.0, 1e-4]}, cv=2,
                          scoring="accuracy", refit=False)
    search.fit(x, y)
    assert np.all(np.isfinite(search.cv_results_["mean_test_score"]))
    assert search.best_params_["optimizer__temperature"] in (0.0, 1e-4)


def test_pickled_net_continues_training():
    x, y = _data()
    net = _net(optimizer__temperature=1e-4).fit(x, y)
    copy = pickle.loads(pickle.dumps(net))
    net.partial_fit(x, y)
    copy.partial_fit(x, y)
    for a, b in zip(net.module_.parameters(), copy.module_.parameters()):
        assert torch.equal(a, b)  # the copy continues exactly as the original
