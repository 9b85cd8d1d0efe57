"""The policy-value network: a residual convolutional tower with a policy head and a value head.

The architecture is the one of the AlphaGo Zero paper (Silver et al. 2017, "Mastering the game of
Go without human knowledge", Methods: "Neural network architecture"), with the tower's size
configurable: a 3x3 convolution stem, ``blocks`` residual blocks of two 3x3 convolutions with
batch normalisation, a policy head (1x1 convolution, a fully connected layer to one logit per
action) and a value head (1x1 convolution, a hidden fully connected layer, one tanh output).

Input: float32 planes ``(B, C, H, W)`` from :meth:`selfplay.games.base.Game.planes_from_compact`.
Output: ``(policy_logits (B, A), value (B,))``; the value is in [-1, 1] from the side to move's
view (+1: the player to move wins).

Optional auxiliary heads (``[network] area_heads``, off by default), used only in training
(:meth:`PolicyValueNet.forward_with_area`; search and inference see the same two outputs): an
ownership head, a 1x1 convolution giving one logit per point whose tanh predicts the final
area owner from the side to move's view, and a score head, a linear layer on the tower's global
average pool predicting the final score margin from the side to move's view divided by the
number of points. Ownership and score targets as auxiliary training signals: D. J. Wu 2019,
"Accelerating Self-Play Learning in Go".
"""

from __future__ import annotations

import contextlib
from typing import Any, Iterator

import torch
from torch import nn

from selfplay.games.base import Game
from selfplay.network_config import NetworkConfig

__all__ = ["NetworkConfig", "PolicyValueNet", "build_network", "fold_for_inference"]


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
        self.has_area_heads = bool(config.area_heads)
        if self.has_area_heads:
            self.ownership_conv = nn.Conv2d(ch, 1, 1)
            self.score_fc = nn.Linear(ch, 1)

    def _policy_value(self, t: torch.Tensor) -> tuple[torch.Tensor, torch.Tensor]:
        p = self.policy_fc(self.policy_conv(t).flatten(1))
        v = torch.relu(self.value_fc1(self.value_conv(t).flatten(1)))
        v = torch.tanh(self.value_fc2(v)).squeeze(1)
        return p, v

    def forward(self, x: torch.Tensor) -> tuple[torch.Tensor, torch.Tensor]:
        """``x`` float32 (B, C, H, W) -> (policy logits (B, A), value (B,) in [-1, 1], side to move)."""
        return self._policy_value(self.tower(self.stem(x)))

    def forward_with_area(self, x: torch.Tensor) -> dict[str, torch.Tensor]:
        """All outputs for training: ``policy`` logits (B, A), ``value`` (B,), and with the area
        heads ``ownership_logit`` (B, H, W) (tanh of it: the predicted final owner of each point,
        +1 the side to move) and ``score`` (B,) (predicted final margin of the side to move,
        divided by H*W points). Raises ValueError for a net built without the area heads."""
        if not self.has_area_heads:
            raise ValueError("this network has no area heads ([network] area_heads = false)")
        t = self.tower(self.stem(x))
        p, v = self._policy_value(t)
        return {"policy": p, "value": v, "ownership_logit": self.ownership_conv(t).squeeze(1),
                "score": self.score_fc(t.mean(dim=(2, 3))).squeeze(1)}

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


# ---- inference form ----------------------------------------------------------------------------

def _fold(conv: nn.Conv2d, bn: nn.BatchNorm2d) -> nn.Conv2d:
    """A convolution with bias equal to ``bn(conv(x))`` in eval mode (batch-norm folding)."""
    std = torch.sqrt(bn.running_var + bn.eps)
    scale = bn.weight / std
    out = nn.Conv2d(conv.in_channels, conv.out_channels, conv.kernel_size, stride=conv.stride,
                    padding=conv.padding, bias=True)
    out.weight.data = (conv.weight * scale[:, None, None, None]).detach().clone()
    bias = conv.bias if conv.bias is not None else torch.zeros_like(bn.running_mean)
    out.bias.data = ((bias - bn.running_mean) * scale + bn.bias).detach().clone()
    return out


class _FoldedBlock(nn.Module):
    def __init__(self, block: ResidualBlock) -> None:
        super().__init__()
        self.conv1 = _fold(block.conv1, block.bn1)
        self.conv2 = _fold(block.conv2, block.bn2)

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        return torch.relu(x + self.conv2(torch.relu(self.conv1(x))))


class InferenceNet(nn.Module):
    """The same function as a :class:`PolicyValueNet` in eval mode, with every batch
    normalisation folded into the convolution before it (fewer passes over memory), stored in
    torch's channels-last layout, in float32 or bfloat16. Built by :func:`fold_for_inference`;
    never trained."""

    def __init__(self, net: PolicyValueNet, channels_last: bool = True, dtype: torch.dtype = torch.float32) -> None:
        super().__init__()
        with torch.no_grad():
            self.stem = _fold(net.stem[0], net.stem[1])
            self.tower = nn.Sequential(*[_FoldedBlock(b) for b in net.tower])
            self.policy_conv = _fold(net.policy_conv[0], net.policy_conv[1])
            self.value_conv = _fold(net.value_conv[0], net.value_conv[1])
            self.policy_fc = nn.Linear(net.policy_fc.in_features, net.policy_fc.out_features)
            self.policy_fc.load_state_dict(net.policy_fc.state_dict())
            self.value_fc1 = nn.Linear(net.value_fc1.in_features, net.value_fc1.out_features)
            self.value_fc1.load_state_dict(net.value_fc1.state_dict())
            self.value_fc2 = nn.Linear(net.value_fc2.in_features, net.value_fc2.out_features)
            self.value_fc2.load_state_dict(net.value_fc2.state_dict())
        self.channels_last = channels_last
        self.dtype = dtype
        self.to(dtype=dtype)
        if channels_last:
            self.to(memory_format=torch.channels_last)
        self.eval()
        for p in self.parameters():
            p.requires_grad_(False)

    def forward(self, x: torch.Tensor) -> tuple[torch.Tensor, torch.Tensor]:
        t = self.tower(torch.relu(self.stem(x)))
        p = self.policy_fc(torch.relu(self.policy_conv(t)).flatten(1))
        v = torch.relu(self.value_fc1(torch.relu(self.value_conv(t)).flatten(1)))
        return p, torch.tanh(self.value_fc2(v)).squeeze(1)


def fold_for_inference(net: PolicyValueNet, channels_last: bool = True,
                       dtype: torch.dtype = torch.float32) -> InferenceNet:
    """An inference-only copy of ``net`` (eval-mode semantics) with batch norms folded; its
    inputs must be of ``dtype``."""
    return InferenceNet(net, channels_last=channels_last, dtype=dtype)


@contextlib.contextmanager
def subnormals_flushed() -> Iterator[None]:
    """Within the block, subnormal floats count as zero in this thread's CPU arithmetic (x86
    FTZ/DAZ, through ``torch.set_flush_denormal``); after it, the thread's default again (other
    code on the thread, a test library's float checks for one, relies on IEEE subnormals).

    Why: a 9×9 Go learner slowed from 181 to 1,935 ms per training step after an hour (snapshot
    59 against snapshot 10, batch 128, one thread): weights decayed towards zero make subnormal
    activations and gradients, which x86 computes in microcode. Values below 1.2e-38 become 0;
    nothing a network learns depends on them. Not re-entrant: the block's end turns flushing off."""
    torch.set_flush_denormal(True)
    try:
        yield
    finally:
        torch.set_flush_denormal(False)


def cpu_has_bf16_matrix_units() -> bool:
    """True when this CPU has AMX tiles with bfloat16 (oneDNN then runs bfloat16 convolutions
    several times faster than float32); False if torch cannot tell."""
    probe = getattr(torch.cpu, "_is_amx_tile_supported", None)
    try:
        return bool(probe()) if probe is not None else False
    except Exception:  # noqa: BLE001 - a private probe; treat any failure as "no"
        return False


def build_network(game: Game, config: NetworkConfig | None = None, *, seed: int = 0) -> PolicyValueNet:
    """A freshly initialised network for ``game`` (deterministic for ``seed``; the global torch
    random state is left untouched). The net is returned in eval mode."""
    config = config or NetworkConfig()
    with torch.random.fork_rng(devices=[]):
        torch.manual_seed(seed)
        net = PolicyValueNet(game.name, game.options(), tuple(game.input_shape), game.num_actions, config)
    net.eval()
    return net
