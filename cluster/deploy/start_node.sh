#!/usr/bin/env bash
# Start Ray by hand on each machine of a CPU cluster (no cluster launcher needed).
#
#   on the head:     cluster/deploy/start_node.sh head
#   on each worker:  cluster/deploy/start_node.sh worker HEAD_HOST
#   then, on head:   selfplay run --preset go9 --out runs/go9 --address auto
#   to stop a node:  cluster/deploy/start_node.sh stop
#
# Environment: PORT (default 6379), HEAD_RESERVED_CPUS (CPUs the head keeps for the buffer,
# learner and snapshot store; default 2), NODE_IP (this machine's address as the other nodes
# reach it; Ray guesses it when unset). A worker that joins while a run is going gets workers
# within `run.top_up_seconds` (10 s by default).
set -euo pipefail

PORT="${PORT:-6379}"
role="${1:-}"
ip_args=()
if [ -n "${NODE_IP:-}" ]; then
    ip_args=(--node-ip-address "$NODE_IP")
fi

case "$role" in
    head)
        cpus=$(nproc)
        reserved="${HEAD_RESERVED_CPUS:-2}"
        workers=$(( cpus > reserved ? cpus - reserved : 1 ))
        ray start --head --port="$PORT" --num-cpus="$workers" --dashboard-host=127.0.0.1 "${ip_args[@]}"
        echo "head started; workers join with: $0 worker $(hostname -I 2>/dev/null | awk '{print $1}')"
        ;;
    worker)
        head="${2:?usage: $0 worker HEAD_HOST}"
        ray start --address="$head:$PORT" "${ip_args[@]}"
        ;;
    stop)
        ray stop
        ;;
    *)
        echo "usage: $0 head | worker HEAD_HOST | stop" >&2
        exit 2
        ;;
esac
