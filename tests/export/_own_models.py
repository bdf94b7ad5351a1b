"""Users' own architectures, as a new user would write them (shared by the export tests)."""

from __future__ import annotations

import torch
from torch import nn

from demur.export.layers import ResidualBlock, VariationalLinear


class DepotConvNet(nn.Module):
    """Digits [1, 8, 8]: deterministic conv stem, max-pool, a residual block, layer norm, tanh,
    a deterministic nn.Linear, a variational head: a custom forward over nested modules."""

    def __init__(self, posterior: str = "radial") -> None:
        super().__init__()
        self.stem = nn.Conv2d(1, 6, 3, padding=1)
        self.pool = nn.MaxPool2d(2)
        self.block = ResidualBlock(6, posterior, init_sigma=0.1)  # the block demur bench measures too
        self.norm = nn.LayerNorm(6 * 4 * 4)
        self.hidden = nn.Linear(6 * 4 * 4, 24)
        self.head = VariationalLinear(24, 10, posterior=posterior, init_sigma=0.1)

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        h = self.block(self.pool(torch.relu(self.stem(x))))
        return self.head(torch.tanh(self.hidden(self.norm(h.flatten(1)))))


def depot_conv_net(posterior: str = "radial", seed: int = 0) -> DepotConvNet:
    """An untrained DepotConvNet with non-trivial batch-norm statistics (eval mode)."""
    torch.manual_seed(seed)
    net = DepotConvNet(posterior)
    with torch.no_grad():
        net.block.bn.running_mean.uniform_(-0.5, 0.5)
        net.block.bn.running_var.uniform_(0.5, 2.0)
        net.block.bn.weight.uniform_(0.5, 1.5)
    return net.eval()


def plain_mlp(inputs: int = 64, outputs: int = 10, seed: int = 0) -> nn.Sequential:
    torch.manual_seed(seed)
    return nn.Sequential(nn.Linear(inputs, 32), nn.ReLU(), nn.Linear(32, outputs)).eval()


def dropout_mlp(inputs: int = 64, outputs: int = 10, p: float = 0.3, seed: int = 0) -> nn.Sequential:
    torch.manual_seed(seed)
    return nn.Sequential(nn.Linear(inputs, 48), nn.ReLU(), nn.Dropout(p), nn.Linear(48, 48), nn.Sigmoid(),
                         nn.Dropout(p), nn.Linear(48, outputs)).eval()


class ResidualSequential(nn.Sequential):
    """The case that used to export silently wrong: children in order, but forward adds a skip."""

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        h = self[0](x)
        return self[2](self[1](h) + h)


def residual_sequential(seed: int = 0) -> ResidualSequential:
    torch.manual_seed(seed)
    return ResidualSequential(VariationalLinear(64, 10, init_sigma=0.05), nn.Tanh(),
                              VariationalLinear(10, 10, init_sigma=0.05)).eval()


def diabetes_regressor(seed: int = 0) -> nn.Sequential:
    """A user's regression network for load_diabetes' 10 features: mean and log-variance of the
    standardised target ([B, 2]), one variational hidden layer and a variational head."""
    torch.manual_seed(seed)
    return nn.Sequential(VariationalLinear(10, 32, posterior="gaussian", init_sigma=0.05), nn.ReLU(),
                         VariationalLinear(32, 2, posterior="gaussian", init_sigma=0.05))

class FrozenBackbone(nn.Module):
    """A deterministic conv backbone for 1x8x8 digits: conv, batch norm, ReLU, a residual conv, pool,
    a linear feature layer (a user's trained network, frozen)."""

    def __init__(self) -> None:
        super().__init__()
        self.stem = nn.Sequential(nn.Conv2d(1, 6, 3, padding=1), nn.BatchNorm2d(6), nn.ReLU())
        self.conv = nn.Conv2d(6, 6, 3, padding=1)
        self.features = nn.Linear(6 * 4 * 4, 24)

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        h = self.stem(x)
        h = torch.max_pool2d(h + torch.relu(self.conv(h)), 2)
        return torch.tanh(self.features(h.flatten(1)))


def frozen_backbone(seed: int = 0) -> FrozenBackbone:
    torch.manual_seed(seed)
    net = FrozenBackbone()
    with torch.no_grad():
        net.stem[1].running_mean.uniform_(-0.5, 0.5)
        net.stem[1].running_var.uniform_(0.5, 2.0)
    return net.eval().requires_grad_(False)


def backbone_head(posterior: str = "gaussian", seed: int = 0) -> nn.Sequential:
    """Bayesian last layers: the frozen backbone, two variational linear layers."""
    backbone = frozen_backbone(seed)
    torch.manual_seed(seed + 1)
    return nn.Sequential(backbone, VariationalLinear(24, 16, posterior=posterior, init_sigma=0.1), nn.GELU(),
                         VariationalLinear(16, 10, posterior=posterior, init_sigma=0.1)).eval()


def backbone_dropout(seed: int = 0) -> nn.Sequential:
    """MC dropout in the head only: the frozen backbone, linear, ReLU, dropout, linear."""
    backbone = frozen_backbone(seed)
    torch.manual_seed(seed + 1)
    return nn.Sequential(backbone, nn.Linear(24, 16), nn.ReLU(), nn.Dropout(0.3), nn.Linear(16, 10)).eval()


def shared_backbone_ensemble(members: int = 3, variational: bool = False) -> list[nn.Module]:
    """A deep ensemble whose members share ONE frozen backbone module and differ in their heads."""
    backbone = frozen_backbone(0)
    heads = []
    for m in range(members):
        torch.manual_seed(10 + m)
        head = VariationalLinear(24, 10, init_sigma=0.1) if variational else nn.Linear(24, 10)
        heads.append(nn.Sequential(backbone, head).eval())
    return heads


class Untraceable(nn.Module):
    """A forward torch.fx cannot follow (Python control flow on a tensor's size), which the
    ONNX exporter's tracer runs concretely: it exports the per-draw way."""

    def __init__(self) -> None:
        super().__init__()
        self.backbone = frozen_backbone(0)
        self.head = VariationalLinear(24, 10, init_sigma=0.1)

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        h = self.backbone(x)
        if h.shape[0] > 0:
            h = torch.relu(h)
        return self.head(h)
