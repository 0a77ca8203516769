"""SSL methods: losses against formulas written here from the papers, momentum rules, and learning."""
from __future__ import annotations

import math

import pytest

torch = pytest.importorskip("torch")
import torch.nn.functional as F  # noqa: E402

from warmstart.encoders import build_encoder  # noqa: E402
from warmstart.pretrain.methods import build_method  # noqa: E402
from warmstart.pretrain.methods.base import pooled  # noqa: E402


def nt_xent_by_formula(z1: torch.Tensor, z2: torch.Tensor, tau: float) -> torch.Tensor:
    """NT-Xent of Chen et al. 2020, eq. (1), averaged over all 2N anchors, written independently."""
    z = F.normalize(torch.cat([z1, z2]), dim=1).double()
    n = z1.shape[0]
    sim = z @ z.T / tau
    total = 0.0
    for i in range(2 * n):
        pos = (i + n) % (2 * n)
        denom = sum(math.exp(sim[i, k]) for k in range(2 * n) if k != i)
        total += -math.log(math.exp(sim[i, pos]) / denom)
    return torch.tensor(total / (2 * n))


def _small(name, **kw):
    torch.manual_seed(0)
    return build_method(name, build_encoder("resnet_narrow", base_width=8), **kw)


def test_simclr_loss_equals_the_paper_formula_and_lightly():
    from lightly.loss import NTXentLoss

    z1, z2 = torch.randn(6, 16, generator=torch.Generator().manual_seed(1)), torch.randn(6, 16, generator=torch.Generator().manual_seed(2))
    ref = nt_xent_by_formula(z1, z2, 0.3)
    assert float(NTXentLoss(temperature=0.3)(z1, z2)) == pytest.approx(float(ref), rel=1e-5)
    m = _small("simclr", temperature=0.3).eval()
    v1, v2 = torch.randn(6, 1, 32, 32), torch.randn(6, 1, 32, 32)
    loss, out = m.loss(v1, v2)
    with torch.no_grad():
        expect = nt_xent_by_formula(m.head(pooled(m.encoder, v1)), m.head(pooled(m.encoder, v2)), 0.3)
    assert float(loss) == pytest.approx(float(expect), rel=1e-5)
    assert out["embedding"].shape == (6, m.encoder.spec.out_channels)


def test_byol_loss_is_symmetric_negative_cosine():
    m = _small("byol").eval()
    v1, v2 = torch.randn(4, 1, 32, 32), torch.randn(4, 1, 32, 32)
    loss, _ = m.loss(v1, v2)
    with torch.no_grad():
        p1, p2 = (m.predictor(m.head(pooled(m.encoder, v))) for v in (v1, v2))
        t1, t2 = (m.head_momentum(pooled(m.encoder_momentum, v)) for v in (v1, v2))
        expect = -0.5 * (F.cosine_similarity(p1, t2).mean() + F.cosine_similarity(p2, t1).mean())
    assert float(loss) == pytest.approx(float(expect), rel=1e-5)


@pytest.mark.parametrize("name", ["moco_v2", "byol"])
def test_momentum_update_follows_the_ema_rule(name):
    m = _small(name, momentum=0.9)
    key = dict(m.encoder_momentum.named_parameters())
    assert all(torch.equal(p, key[n]) for n, p in m.encoder.named_parameters())  # starts as a copy
    with torch.no_grad():
        for p in m.encoder.parameters():
            p.add_(0.5)
    before = {n: p.clone() for n, p in key.items()}
    m.after_step(0, 100)  # cosine schedule: momentum 0.9 at step 0
    for n, p in m.encoder.named_parameters():
        torch.testing.assert_close(key[n], 0.9 * before[n] + 0.1 * p)
    if name == "moco_v2":
        assert m.momentum_at(0, 100) == pytest.approx(0.9) and m.momentum_at(100, 100) == pytest.approx(1.0)
        assert 0.9 < m.momentum_at(50, 100) < 1.0


@pytest.mark.parametrize("name", ["simclr", "moco_v2", "byol"])
def test_each_method_learns_on_a_fixed_batch(name):
    torch.manual_seed(0)
    m = _small(name, **({"queue_size": 64} if name == "moco_v2" else {}))
    opt = torch.optim.Adam([p for p in m.parameters() if p.requires_grad], lr=1e-3)
    g = torch.Generator().manual_seed(0)
    x = torch.rand(16, 1, 32, 32, generator=g)
    views = [(x + 0.05 * torch.randn(x.shape, generator=g), x.flip(-1) + 0.05 * torch.randn(x.shape, generator=g)) for _ in range(4)]
    losses = []
    for step in range(40):
        v1, v2 = views[step % 4]
        loss, _ = m.loss(v1, v2)
        opt.zero_grad()
        loss.backward()
        opt.step()
        m.after_step(step, 40)
        losses.append(float(loss))
    assert sum(losses[-5:]) / 5 < sum(losses[:5]) / 5


def test_exported_encoder_and_registry_errors():
    m = _small("moco_v2")
    assert m.exported_encoder() is m.encoder and m.exported_encoder(momentum=True) is m.encoder_momentum
    with pytest.raises(ValueError, match="unknown method"):
        build_method("dino", build_encoder("resnet_narrow"))
    with pytest.raises(ValueError, match="no parameter 'tau'"):
        build_method("simclr", build_encoder("resnet_narrow"), tau=0.1)
