"""The digit classifiers of the meter reader (PyTorch modules, pixels [N,1,8,8] -> logits [N,10]).

Transformation: none at import; build.py instantiates these, trains them on the
digits split and exports them. BatchNorm layers sit right behind Conv layers so
the exporter folds them into the Conv in eval mode (the MLP's BatchNorm1d behind a
Gemm stays a separate node).
"""
from __future__ import annotations

import logging

import torch
from torch import nn

logger = logging.getLogger(__name__)


def conv_block(c_in: int, c_out: int) -> nn.Sequential:
    """Conv 3x3 (same padding) + BatchNorm + SiLU; the exporter fuses BN into the Conv in eval mode."""
    return nn.Sequential(nn.Conv2d(c_in, c_out, 3, padding=1, bias=False), nn.BatchNorm2d(c_out), nn.SiLU())


class SqueezeExcite(nn.Module):
    """Channel gate: x * Sigmoid(Conv1x1(ReLU(Conv1x1(GAP(x)))))."""

    def __init__(self, channels: int, hidden: int):
        super().__init__()
        self.pool = nn.AdaptiveAvgPool2d(1)
        self.reduce = nn.Conv2d(channels, hidden, 1)
        self.act = nn.ReLU()
        self.expand = nn.Conv2d(hidden, channels, 1)
        self.gate = nn.Sigmoid()

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        return x * self.gate(self.expand(self.act(self.reduce(self.pool(x)))))


class MeterCNN(nn.Module):
    """1->16->32->32 channels, a 2x2 max-pool, one squeeze-excite gate, GAP + Linear head."""

    def __init__(self):
        super().__init__()
        self.features = nn.Sequential(conv_block(1, 16), conv_block(16, 32), nn.MaxPool2d(2),
                                      conv_block(32, 32), SqueezeExcite(32, 8))
        self.head = nn.Sequential(nn.AdaptiveAvgPool2d(1), nn.Flatten(), nn.Linear(32, 10))

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        return self.head(self.features(x))


class GeluMLP(nn.Module):
    """Flatten -> Linear 64 -> GELU(exact) -> Linear 32 -> GELU(exact) -> Linear 10."""

    def __init__(self):
        super().__init__()
        self.net = nn.Sequential(nn.Flatten(), nn.Linear(64, 64), nn.GELU(), nn.Linear(64, 32),
                                 nn.GELU(), nn.Linear(32, 10))

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        return self.net(x)


class TanhSigmoidMLP(nn.Module):
    """Flatten -> Linear 48 -> Tanh -> Linear 32 -> Sigmoid -> Linear 10."""

    def __init__(self):
        super().__init__()
        self.net = nn.Sequential(nn.Flatten(), nn.Linear(64, 48), nn.Tanh(), nn.Linear(48, 32),
                                 nn.Sigmoid(), nn.Linear(32, 10))

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        return self.net(x)


class MishGeluTanhMLP(nn.Module):
    """Flatten -> Linear 48 -> BatchNorm1d -> Mish -> Linear 32 -> GELU(tanh) -> Linear 10."""

    def __init__(self):
        super().__init__()
        self.net = nn.Sequential(nn.Flatten(), nn.Linear(64, 48), nn.BatchNorm1d(48), nn.Mish(),
                                 nn.Linear(48, 32), nn.GELU(approximate="tanh"), nn.Linear(32, 10))

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        return self.net(x)


class ResBlock(nn.Module):
    """SiLU(BN(Conv3x3(SiLU(BN(Conv3x3(x))))) + skip(x)); skip = identity, or Conv1x1+BN when the shape changes."""

    def __init__(self, c_in: int, c_out: int, stride: int = 1):
        super().__init__()
        self.conv1 = nn.Conv2d(c_in, c_out, 3, stride=stride, padding=1, bias=False)
        self.bn1 = nn.BatchNorm2d(c_out)
        self.act1 = nn.SiLU()
        self.conv2 = nn.Conv2d(c_out, c_out, 3, padding=1, bias=False)
        self.bn2 = nn.BatchNorm2d(c_out)
        self.skip = nn.Identity() if stride == 1 and c_in == c_out else nn.Sequential(
            nn.Conv2d(c_in, c_out, 1, stride=stride, bias=False), nn.BatchNorm2d(c_out))
        self.act2 = nn.SiLU()  # right behind the residual Add

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        h = self.act1(self.bn1(self.conv1(x)))
        return self.act2(self.bn2(self.conv2(h)) + self.skip(x))


class MeterResNet(nn.Module):
    """Stem Conv 1->16; 3 blocks at 16 ch (8x8); 1 block to 32 ch, stride 2 (4x4); 2 blocks at 32 ch; GAP, Linear."""

    def __init__(self):
        super().__init__()
        self.features = nn.Sequential(conv_block(1, 16), ResBlock(16, 16), ResBlock(16, 16), ResBlock(16, 16),
                                      ResBlock(16, 32, stride=2), ResBlock(32, 32), ResBlock(32, 32))
        self.head = nn.Sequential(nn.AdaptiveAvgPool2d(1), nn.Flatten(), nn.Linear(32, 10))

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        return self.head(self.features(x))
