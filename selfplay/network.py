"""The policy-value network: a residual convolutional tower with a policy head and a value head.

The architecture is the one of the AlphaGo Zero paper (Silver et al. 2017, "Mastering the game of
Go without human knowledge", Methods: "Neural network architecture"), with the tower's size
configurable: a 3x3 convolution stem, ``blocks`` residual blocks of two 3x3 convolutions with
batch normalisation, a policy head (1x1 convolution, a fully connected layer to one logit per
action) and a value head (1x1 convolution, a hidden fully connected layer, one tanh output).

Input: float32 planes ``(B, C, H, W)`` from :meth:`selfplay.games.base.Game.planes_from_compact`.
Output: ``(policy_logits (B, A), value (B,))``; the value is in [-1, 1] from the side to move's
view (+1: the player to move wins).
"""

from __future__ import annotations

from typing import Any

import torch
from pydantic import BaseModel, ConfigDict, Field
from torch import nn

from selfplay.games.base import Game


class NetworkConfig(BaseModel):
    """Size of the residual tower and its heads."""

    model_config = ConfigDict(extra="forbid", frozen=True)

    blocks: int = Field(6, ge=0, le=64, description="Number of residual blocks in the tower (each two 3x3 convolutions).")
    channels: int = Field(64, ge=1, le=1024, description="Convolution channels throughout the tower.")
    policy_channels: int = Field(2, ge=1, le=64, description="Channels of the policy head's 1x1 convolution (2 in AlphaGo Zero).")
    value_channels: int = Field(1, ge=1, le=64, description="Channels of the value head's 1x1 convolution (1 in AlphaGo Zero).")
    value_hidden: int = Field(64, ge=1, le=4096, description="Width of the value head's hidden fully connected layer (256 in AlphaGo Zero).")

    @classmethod
    def tiny(cls) -> "NetworkConfig":
        """A very small net for tests: 1 block x 16 channels."""
        return cls(blocks=1, channels=16, value_hidden=16)

    @classmethod
    def reference(cls) -> "NetworkConfig":
        """The benchmark size: 6 blocks x 64 channels."""
        return cls(blocks=6, channels=64, value_hidden=64)


class ResidualBlock(nn.Module):
    """conv3x3-BN-ReLU-conv3x3-BN, plus the input, then ReLU (He et al. 2016, as in AlphaGo Zero)."""

    def __init__(self, channels: int) -> None:
        super().__init__()
        self.conv1 = nn.Conv2d(channels, channels, 3, padding=1, bias=False)
        self.bn1 = nn.BatchNorm2d(channels)
        self.conv2 = nn.Conv2d(channels, channels, 3, padding=1, bias=False)
        self.bn2 = nn.BatchNorm2d(channels)

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        y = torch.relu(self.bn1(self.conv1(x)))
        y = self.bn2(self.conv2(y))
        return torch.relu(x + y)


class PolicyValueNet(nn.Module):
    """Residual policy-value network for one game's input shape and action count.

    Attributes used by the snapshot store and the evaluators: ``game_name``, ``game_options``,
    ``input_shape`` (C, H, W), ``num_actions`` and ``config`` (:class:`NetworkConfig`)."""

    def __init__(self, game_name: str, game_options: dict[str, Any], input_shape: tuple[int, int, int],
                 num_actions: int, config: NetworkConfig) -> None:
        super().__init__()
        self.game_name = game_name
        self.game_options = dict(game_options)
        self.input_shape = tuple(int(v) for v in input_shape)
        self.num_actions = int(num_actions)
        self.config = config
        c_in, h, w = self.input_shape
        ch = config.channels
        self.stem = nn.Sequential(nn.Conv2d(c_in, ch, 3, padding=1, bias=False), nn.BatchNorm2d(ch), nn.ReLU())
        self.tower = nn.Sequential(*[ResidualBlock(ch) for _ in range(config.blocks)])
        pc, vc = config.policy_channels, config.value_channels
        self.policy_conv = nn.Sequential(nn.Conv2d(ch, pc, 1, bias=False), nn.BatchNorm2d(pc), nn.ReLU())
        self.policy_fc = nn.Linear(pc * h * w, self.num_actions)
        self.value_conv = nn.Sequential(nn.Conv2d(ch, vc, 1, bias=False), nn.BatchNorm2d(vc), nn.ReLU())
        self.value_fc1 = nn.Linear(vc * h * w, config.value_hidden)
        self.value_fc2 = nn.Linear(config.value_hidden, 1)

    def forward(self, x: torch.Tensor) -> tuple[torch.Tensor, torch.Tensor]:
        """``x`` float32 (B, C, H, W) -> (policy logits (B, A), value (B,) in [-1, 1], side to move)."""
        t = self.tower(self.stem(x))
        p = self.policy_fc(self.policy_conv(t).flatten(1))
        v = torch.relu(self.value_fc1(self.value_conv(t).flatten(1)))
        v = torch.tanh(self.value_fc2(v)).squeeze(1)
        return p, v

    def metadata(self) -> dict[str, Any]:
        """Plain JSON-able description of the architecture and the game it fits."""
        return {
            "game": self.game_name,
            "game_options": dict(self.game_options),
            "input_shape": list(self.input_shape),
            "num_actions": self.num_actions,
            "network": self.config.model_dump(),
        }

    def fits(self, game: Game) -> str | None:
        """None if this net fits ``game``; otherwise a sentence saying what does not fit."""
        problems = []
        if game.name != self.game_name:
            problems.append(f"it was built for game {self.game_name!r}")
        if tuple(game.input_shape) != self.input_shape:
            problems.append(f"input shape {self.input_shape} but the game encodes {tuple(game.input_shape)}")
        if game.num_actions != self.num_actions:
            problems.append(f"{self.num_actions} policy outputs but the game has {game.num_actions} actions")
        if not problems:
            return None
        return (f"network built for {self.game_name} {self.game_options} does not fit game "
                f"{game.name} {game.options()}: " + "; ".join(problems))


def build_network(game: Game, config: NetworkConfig | None = None, *, seed: int = 0) -> PolicyValueNet:
    """A freshly initialised network for ``game`` (deterministic for ``seed``; the global torch
    random state is left untouched). The net is returned in eval mode."""
    config = config or NetworkConfig()
    with torch.random.fork_rng(devices=[]):
        torch.manual_seed(seed)
        net = PolicyValueNet(game.name, game.options(), tuple(game.input_shape), game.num_actions, config)
    net.eval()
    return net
