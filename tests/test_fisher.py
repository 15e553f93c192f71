"""The Fisher monitor: closed forms for softmax regression, an explicit per-example loop, and
the promise that probing never changes training.

References
----------
- Softmax-regression gradient: d/dW log p(y|x) = (onehot(y) - p) x^T and d/db = onehot(y) - p
  (Bishop, Pattern Recognition and Machine Learning, 2006, section 4.3.4). Hence the empirical
  Fisher trace is mean ||onehot(y) - p||^2 (||x||^2 + 1), and with y drawn from p it is, in
  expectation, mean (1 - ||p||^2)(||x||^2 + 1), since E_y ||e_y - p||^2 = 1 - ||p||^2.
- Empirical versus model-sampled Fisher: Kunstner, Balles and Hennig (2019), "Limitations of
  the empirical Fisher approximation for natural gradient descent".
- Data: scikit-learn's bundled handwritten digits (UCI optical digits) and mnist1d.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
import torch
from hydra.utils import instantiate
from sklearn.datasets import load_digits
from sklearn.linear_model import LogisticRegression
from torch import nn

from periodscan.config import compose_config, to_plain
from periodscan.data.digits import load_digits as load_digits_data
from periodscan.data.mnist1d import load_mnist1d
from periodscan.errors import ConfigError
from periodscan.fisher import TOTAL, layerwise
from periodscan.fisher.trace import fisher_trace
from periodscan.jobs.sweep import run_sweep
from periodscan.ledger import Ledger
from periodscan.models import MLP, CNN1d, CNN2d, TinyResNet
from periodscan.monitors import FisherMonitor, Monitor
from periodscan.monitors.fisher import probe_indices

FISHER = {"_target_": "periodscan.monitors.FisherMonitor", "probe_size": 64}


# --- closed forms on multinomial logistic regression ------------------------------------------

@pytest.fixture(scope="module")
def softmax_regression():
    """A softmax regression fitted by scikit-learn on the digits, copied into a torch model."""
    digits = load_digits()
    x = digits.data / 16.0  # (1797, 64) in [0, 1]
    y = digits.target
    fit = LogisticRegression(C=0.05, max_iter=2000).fit(x, y)  # multinomial with lbfgs
    model = MLP((64,), 10, hidden=[]).double()  # Flatten -> Linear(64, 10)
    with torch.no_grad():
        model.net[1].weight.copy_(torch.from_numpy(fit.coef_))
        model.net[1].bias.copy_(torch.from_numpy(fit.intercept_))
    x, y = x[:600], y[:600]  # the Fisher on a probe of 600 examples
    probs = fit.predict_proba(x)
    x_t, y_t = torch.from_numpy(x), torch.from_numpy(y)
    with torch.no_grad():  # the copy is the same classifier as scikit-learn's
        np.testing.assert_allclose(torch.softmax(model(x_t), 1).numpy(), probs, rtol=1e-9,
                                   atol=1e-12)
    return model, x, y, probs, x_t, y_t


@pytest.mark.parametrize("method", ["layerwise", "vmap"])
def test_empirical_fisher_matches_closed_form(softmax_regression, method):
    model, x, y, probs, x_t, y_t = softmax_regression
    onehot = np.eye(10)[y]
    # Bishop (2006) 4.3.4: per-example gradient (onehot(y) - p) [x, 1]^T
    expected = np.mean(((onehot - probs) ** 2).sum(1) * ((x**2).sum(1) + 1.0))
    got = fisher_trace(model, x_t, y_t, method=method)
    assert list(got) == ["net.1"]
    assert got["net.1"] == pytest.approx(expected, rel=1e-10)


@pytest.mark.parametrize("method", ["layerwise", "vmap"])
def test_expected_fisher_matches_closed_form(softmax_regression, method):
    model, x, _, probs, x_t, _ = softmax_regression
    # Bishop (2006) 4.3.4 with y ~ p: E||e_y - p||^2 = 1 - ||p||^2 (Kunstner et al. 2019)
    expected = np.mean((1.0 - (probs**2).sum(1)) * ((x**2).sum(1) + 1.0))
    got = fisher_trace(model, x_t, estimator="expected", method=method)
    assert got["net.1"] == pytest.approx(expected, rel=1e-10)


@pytest.mark.parametrize("method", ["layerwise", "vmap"])
def test_sampled_fisher_matches_closed_form_for_its_labels(softmax_regression, method):
    model, x, _, probs, x_t, _ = softmax_regression
    samples = 3
    got = fisher_trace(model, x_t, estimator="sampled", samples=samples, method=method,
                       gen=torch.Generator().manual_seed(7))
    # The same draws again: the labels the estimator used.
    drawn = torch.multinomial(torch.from_numpy(probs), samples, replacement=True,
                              generator=torch.Generator().manual_seed(7)).numpy()
    sq = ((np.eye(10)[drawn] - probs[:, None, :]) ** 2).sum(2)  # (N, samples)
    expected = np.mean(sq.mean(1) * ((x**2).sum(1) + 1.0))  # Bishop (2006) 4.3.4
    assert got["net.1"] == pytest.approx(expected, rel=1e-10)


def test_sampled_fisher_converges_to_the_fisher(softmax_regression):
    model, x, _, probs, x_t, _ = softmax_regression
    samples = 100
    got = fisher_trace(model, x_t, estimator="sampled", samples=samples,
                       gen=torch.Generator().manual_seed(3))["net.1"]
    norm = (x**2).sum(1) + 1.0
    # E_y and Var_y of v = ||e_y - p||^2 (||x||^2 + 1) per example, exactly, over y ~ p.
    v = ((np.eye(10)[None] - probs[:, None, :]) ** 2).sum(2) * norm[:, None]  # (N, classes)
    mean = (probs * v).sum(1)
    var = (probs * v**2).sum(1) - mean**2
    sd = np.sqrt(var.sum() / (len(x) ** 2 * samples))
    assert mean.mean() == pytest.approx(np.mean((1 - (probs**2).sum(1)) * norm), rel=1e-12)
    assert abs(got - mean.mean()) < 4 * sd  # a 4-sigma Monte Carlo band (common practice)


# --- per-example loop on small networks -------------------------------------------------------

def _trained(model: nn.Module, x: torch.Tensor, y: torch.Tensor, steps: int = 10) -> nn.Module:
    """A few SGD steps in train mode, so weights and BatchNorm statistics are not at init."""
    torch.manual_seed(0)
    opt = torch.optim.SGD(model.parameters(), lr=0.05, momentum=0.9)
    model.train()
    for step in range(steps):
        idx = torch.arange(step * 32, step * 32 + 32) % len(y)
        opt.zero_grad()
        nn.functional.cross_entropy(model(x[idx]), y[idx]).backward()
        opt.step()
    opt.zero_grad(set_to_none=True)
    return model


def _loop_trace(model: nn.Module, x: torch.Tensor, y: torch.Tensor | None) -> dict[str, float]:
    """Reference: one example at a time, autograd on its log-likelihood, eval mode.

    With ``y`` None the expected Fisher: every class weighted by its probability.
    """
    model.eval()
    params = dict(model.named_parameters())
    total: dict[str, float] = {}
    for i in range(len(x)):
        logp = torch.log_softmax(model(x[i : i + 1]), dim=1)[0]
        classes = range(len(logp)) if y is None else [int(y[i])]
        for c in classes:
            weight = float(logp[c].detach().exp()) if y is None else 1.0
            grads = torch.autograd.grad(logp[c], list(params.values()), retain_graph=True)
            for name, g in zip(params, grads, strict=True):
                layer = name.rsplit(".", 1)[0]
                total[layer] = total.get(layer, 0.0) + weight * float(g.double().pow(2).sum())
    return {k: v / len(x) for k, v in total.items()}


@pytest.fixture(scope="module")
def signals():
    data = load_mnist1d(n_train=600, n_test=100)
    return data.x_train, data.y_train


@pytest.fixture(scope="module")
def images():
    data = load_digits_data(upsample=2)
    return data.x_train, data.y_train


NETWORKS = {
    "cnn1d_bn_dropout": (lambda: CNN1d((1, 40), 10, channels=8, batchnorm=True, dropout=0.3),
                         "signals"),
    "cnn1d": (lambda: CNN1d((1, 40), 10, channels=8), "signals"),
    "cnn2d_bn": (lambda: CNN2d((1, 16, 16), 10, channels=6, batchnorm=True), "images"),
    "mlp_bn_dropout": (lambda: MLP((1, 40), 10, hidden=[24], batchnorm=True, dropout=0.2),
                       "signals"),
    "tiny_resnet": (lambda: TinyResNet((1, 16, 16), 10, width=4), "images"),
    # In-place ReLUs overwrite recorded layer outputs: the layer-wise route must notice.
    "inplace_relu": (lambda: nn.Sequential(nn.Conv1d(1, 4, 3, padding=1), nn.ReLU(inplace=True),
                                           nn.Flatten(), nn.Linear(160, 16),
                                           nn.ReLU(inplace=True), nn.Linear(16, 10)),
                     "signals"),
}


CASES = [(name, "empirical") for name in sorted(NETWORKS)] + [("cnn1d_bn_dropout", "expected")]


@pytest.mark.parametrize("network, estimator", CASES)
def test_vectorised_matches_per_example_loop(network, estimator, request):
    build, dataset = NETWORKS[network]
    x, y = request.getfixturevalue(dataset)
    torch.manual_seed(1)
    model = _trained(build(), x, y)
    probe_x, probe_y = x[:12], y[:12]
    want = _loop_trace(model, probe_x, probe_y if estimator == "empirical" else None)
    for method in ("layerwise", "vmap"):
        got = fisher_trace(model, probe_x, probe_y, estimator=estimator, method=method,
                           chunk_size=5)
        assert set(got) == set(want)
        for layer in want:  # float32 arithmetic in a different order: relative 1e-4
            assert got[layer] == pytest.approx(want[layer], rel=1e-4, abs=1e-9), (method, layer)


class _Scaled(nn.Module):
    """A parameter on a plain module and a layer applied twice: outside the layer-wise route."""

    def __init__(self) -> None:
        super().__init__()
        self.inner = nn.Linear(40, 40)
        self.scale = nn.Parameter(torch.full((40,), 0.5))
        self.head = nn.Linear(40, 10)

    def forward(self, x):
        h = x.flatten(1) * self.scale
        return self.head(torch.tanh(self.inner(torch.tanh(self.inner(h)))))


def test_other_models_fall_back_to_vmap(signals):
    x, y = signals
    torch.manual_seed(2)
    model = _trained(_Scaled(), x, y)
    assert not layerwise.supports(model)
    got = fisher_trace(model, x[:16], y[:16])  # method="auto"
    want = _loop_trace(model, x[:16], y[:16])
    assert set(got) == {"_root", "inner", "head"}
    want["_root"] = want.pop("scale")  # a parameter of the model itself
    for layer in want:
        assert got[layer] == pytest.approx(want[layer], rel=1e-4), layer
    with pytest.raises(ConfigError, match="monitor.method"):
        fisher_trace(model, x[:16], y[:16], method="layerwise")


def test_a_shared_layer_is_detected_at_run_time(signals):
    """A supported layer type called twice: squared_norms declines, auto still gets it right."""
    x, y = signals

    class Twice(nn.Module):
        def __init__(self):
            super().__init__()
            self.inner = nn.Linear(40, 40)
            self.head = nn.Linear(40, 10)

        def forward(self, x):
            return self.head(torch.tanh(self.inner(torch.tanh(self.inner(x.flatten(1))))))

    torch.manual_seed(3)
    model = _trained(Twice(), x, y).eval()
    assert layerwise.supports(model)
    assert layerwise.squared_norms(model, x[:8], [(y[:8], None)]) is None
    got = fisher_trace(model, x[:8], y[:8])
    want = _loop_trace(model, x[:8], y[:8])
    assert got == pytest.approx(want, rel=1e-4)


# --- the monitor leaves training alone ----------------------------------------------------------

@pytest.mark.parametrize("estimator", ["empirical", "sampled", "expected"])
@pytest.mark.parametrize("mode", ["train", "eval"])
def test_probe_changes_no_state(signals, estimator, mode):
    x, y = signals
    torch.manual_seed(4)
    model = _trained(CNN1d((1, 40), 10, channels=8, batchnorm=True, dropout=0.3), x, y)
    model.train(mode == "train")
    state = {k: v.clone() for k, v in model.state_dict().items()}
    rng = torch.get_rng_state()
    fisher_trace(model, x[:32], y[:32], estimator=estimator, gen=torch.Generator())
    assert model.training == (mode == "train")
    assert all(p.grad is None for p in model.parameters())
    assert torch.equal(torch.get_rng_state(), rng)
    for key, value in model.state_dict().items():
        assert torch.equal(value, state[key]), key


def test_monitor_readings_names_and_schedule(signals):
    x, y = signals
    from periodscan.data.base import TensorData

    data = TensorData(x, y, x[:50], y[:50], num_classes=10)
    torch.manual_seed(5)
    model = _trained(CNN1d((1, 40), 10, channels=8), x, y)
    monitor = FisherMonitor(probe_size=40, every=3)
    readings = monitor(model, data, seed=0, epoch=3)
    assert set(readings) == {TOTAL, "fisher/features.0", "fisher/features.2",
                             "fisher/features.4", "fisher/head"}
    assert readings[TOTAL] == pytest.approx(sum(v for k, v in readings.items() if k != TOTAL))
    assert isinstance(monitor, Monitor) and monitor.every == 3 and monitor.on_windows is False
    # The probe is fixed per seed, drawn without replacement, and differs between seeds.
    probe = probe_indices(0, len(y), 40)
    assert torch.equal(probe, probe_indices(0, len(y), 40))
    assert len(set(probe.tolist())) == 40 and not torch.equal(probe, probe_indices(1, len(y), 40))
    direct = fisher_trace(model, x[probe], y[probe])
    assert readings["fisher/head"] == direct["head"]


@pytest.mark.parametrize("field, value", [("probe_size", 0), ("estimator", "true"),
                                          ("every", 1.5), ("method", "loop"),
                                          ("on_windows", "yes")])
def test_monitor_rejects_bad_settings(field, value):
    with pytest.raises(ConfigError, match=f"monitor.{field}"):
        FisherMonitor(**{field: value})


def test_fisher_option_composes():
    plain = to_plain(compose_config(["monitor=fisher", "monitor.probe_size=100"]))
    monitor = instantiate(plain["monitor"])
    assert isinstance(monitor, FisherMonitor) and monitor.probe_size == 100
    assert plain["monitor"]["on_windows"] is False


def _epochs(folder) -> pd.DataFrame:
    ledger = Ledger(folder)
    try:
        frame = ledger.epochs_frame().drop(columns=["seconds"])
        extras = ledger.extras_frame()
    finally:
        ledger.close()
    return frame.sort_values(["run_id", "epoch"]).reset_index(drop=True), extras


@pytest.mark.parametrize("on_windows", [False, True])
def test_sweep_with_monitor_trains_bit_identically(make_config, on_windows):
    plain = run_sweep(make_config(seeds=1), quiet=True)
    watched = run_sweep(make_config(seeds=1, name="tiny-fisher",
                                    monitor={**FISHER, "on_windows": on_windows}), quiet=True)
    base, no_extras = _epochs(plain.folder)
    probed, extras = _epochs(watched.folder)
    assert no_extras.empty
    pd.testing.assert_frame_equal(base, probed)  # every metric, every epoch, bit for bit
    pd.testing.assert_frame_equal(plain.runs.drop(columns="finished_at").reset_index(drop=True),
                                  watched.runs.drop(columns="finished_at").reset_index(drop=True))
    totals = extras[extras.name == TOTAL]
    baseline = totals[totals.length == 0]
    assert sorted(baseline.epoch) == list(range(8))  # the trunk: every epoch of the schedule
    windows = totals[totals.length > 0]
    deficit_epochs = windows[windows.epoch >= windows.start_epoch]
    assert deficit_epochs.empty != on_windows  # windows probed only when asked
    assert np.isfinite(totals.value).all() and (totals.value > 0).all()
