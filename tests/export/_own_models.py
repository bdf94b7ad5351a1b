"""Users' own architectures, as a new user would write them (shared by the export tests)."""

from __future__ import annotations

import torch
from torch import nn

from demur.export.layers import VariationalConv2d, VariationalLinear


class ResidualBlock(nn.Module):
    """conv -> batch norm -> + skip -> GELU, with a variational convolution."""

    def __init__(self, channels: int, posterior: str) -> None:
        super().__init__()
        self.conv = VariationalConv2d(channels, channels, 3, padding=1, posterior=posterior, init_sigma=0.1)
        self.bn = nn.BatchNorm2d(channels)
        self.act = nn.GELU()

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        return self.act(x + self.bn(self.conv(x)))


class DepotConvNet(nn.Module):
    """Digits [1, 8, 8]: deterministic conv stem, max-pool, a residual block, layer norm, tanh,
    a deterministic nn.Linear, a variational head: a custom forward over nested modules."""

    def __init__(self, posterior: str = "radial") -> None:
        super().__init__()
        self.stem = nn.Conv2d(1, 6, 3, padding=1)
        self.pool = nn.MaxPool2d(2)
        self.block = ResidualBlock(6, posterior)
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
