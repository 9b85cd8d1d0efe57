"""Size of the policy-value network (the ``[network]`` section of run.toml).

Kept apart from :mod:`selfplay.network` so that reading or checking a configuration does not
import torch; ``selfplay.network`` re-exports it.
"""

from __future__ import annotations

from pydantic import ConfigDict, Field

from selfplay.config_model import ConfigModel


class NetworkConfig(ConfigModel):
    """Size of the residual tower and its heads."""

    model_config = ConfigDict(extra="forbid", frozen=True)

    blocks: int = Field(6, ge=0, le=64, description="Number of residual blocks in the tower (each two 3x3 convolutions).")
    channels: int = Field(64, ge=1, le=1024, description="Convolution channels throughout the tower.")
    policy_channels: int = Field(2, ge=1, le=64, description="Channels of the policy head's 1x1 convolution (2 in AlphaGo Zero).")
    value_channels: int = Field(1, ge=1, le=64, description="Channels of the value head's 1x1 convolution (1 in AlphaGo Zero).")
    value_hidden: int = Field(64, ge=1, le=4096, description="Width of the value head's hidden fully connected layer (256 in AlphaGo Zero).")
    area_heads: bool = Field(False, description=(
        "Add two auxiliary heads trained from the final area of games scored by area (Go): an ownership "
        "head (1x1 convolution, tanh per point) and a score-margin head (global average pool, one linear "
        "output), as auxiliary targets in Wu 2019. Off: the network has exactly the tensors it had without them."))

    @classmethod
    def tiny(cls) -> "NetworkConfig":
        """A very small net for tests: 1 block x 16 channels."""
        return cls(blocks=1, channels=16, value_hidden=16)

    @classmethod
    def reference(cls) -> "NetworkConfig":
        """The benchmark size: 6 blocks x 64 channels."""
        return cls(blocks=6, channels=64, value_hidden=64)
