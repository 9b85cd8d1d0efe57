"""Where the actors run: the buffer, learner and snapshot store on the head node (they own the
run directory's files), self-play workers spread over every node.

The head is found by the resource ``node:__internal_head__`` that Ray gives the head node (and
only it); asking for a sliver of it pins an actor to the head, and a restarted actor lands there
again. Workers use Ray's ``SPREAD`` strategy, so they fill the nodes evenly and a worker whose
node died is placed on a node that is alive.
"""

from __future__ import annotations

from typing import Any

#: resource Ray puts on the head node only
HEAD_RESOURCE = "node:__internal_head__"


def head_options(num_cpus: float = 0.0) -> dict[str, Any]:
    """``.options(...)`` for an actor that must live on the head node."""
    return {"num_cpus": num_cpus, "resources": {HEAD_RESOURCE: 0.001}}


def worker_options(cpus_per_worker: int = 1) -> dict[str, Any]:
    """``.options(...)`` for a self-play worker: one CPU each (its torch threads), spread out."""
    return {"num_cpus": cpus_per_worker, "scheduling_strategy": "SPREAD"}


def head_node_id() -> str | None:
    """Node id of the head (None if Ray reports no head, e.g. a client connection)."""
    import ray

    for node in ray.nodes():
        if node.get("Alive") and HEAD_RESOURCE in node.get("Resources", {}):
            return node["NodeID"]
    return None


def alive_nodes() -> list[dict[str, Any]]:
    """Ray's records of the alive nodes."""
    import ray

    return [n for n in ray.nodes() if n.get("Alive")]
