"""Configuration of record storage and the replay window (the ``[replay]`` section of run.toml)."""

from __future__ import annotations

from typing import Literal

from pydantic import ConfigDict, Field

from selfplay.config_model import ConfigModel


class ReplayConfig(ConfigModel):
    """Shards, catalog and the in-RAM replay window."""

    model_config = ConfigDict(extra="forbid")

    window_positions: int = Field(
        500_000, ge=1, le=100_000_000,
        description="positions held in the replay window (the newest N); 1,000,000 positions of "
        "9x9 Go take about 0.2-0.45 GB of RAM",
    )
    recency_weight: float = Field(
        0.0, ge=0.0, le=1000.0,
        description="0 samples the window uniformly; w makes the newest position 1 + w times as "
        "likely to be drawn as the oldest, linearly in between",
    )
    augment: bool = Field(
        True, description="apply a random symmetry of the game (board, policy and legal mask) "
        "to every sampled position",
    )
    shard_max_games: int = Field(
        512, ge=1, le=1_000_000, description="a shard is written when this many games wait")
    shard_max_bytes: int = Field(
        16 * 1024 * 1024, ge=1024, le=1024 * 1024 * 1024,
        description="... or when the waiting games' encoded frames reach this many bytes")
    shard_max_age_seconds: float = Field(
        60.0, ge=0.0, le=86_400.0,
        description="... or when the oldest waiting game has waited this many seconds")
    compress: bool = Field(
        True, description="deflate each record frame in the shards (3-5x smaller on disk)")
    verify_on_open: Literal["size", "crc", "full"] = Field(
        "crc", description="how a reopened run checks its catalogued shards: 'size' (cheapest), "
        "'crc' (each file's CRC32 against the catalog's: reads every byte) or 'full' (every "
        "frame decoded and its game compared with run.toml's). Not part of the run's identity",
    )

    def store_options(self) -> dict[str, object]:
        """Keyword arguments for :class:`selfplay.replay.store.RecordStore`."""
        return {"max_games": self.shard_max_games, "max_bytes": self.shard_max_bytes,
                "max_age_seconds": self.shard_max_age_seconds, "compress": self.compress,
                "verify": self.verify_on_open}
