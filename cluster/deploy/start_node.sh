#!/usr/bin/env bash
# Start Ray by hand on each machine of a CPU cluster (no cluster launcher needed), with Ray's
# token authentication on (Ray 2.52 or later: RAY_AUTH_MODE=token; every node and every client
# must hold the same token).
#
#   on the head:     cluster/deploy/start_node.sh head        (makes ~/.ray/auth_token if missing)
#   copy the token:  scp ~/.ray/auth_token WORKER:.ray/auth_token      (to every other machine)
#   on each worker:  cluster/deploy/start_node.sh worker HEAD_HOST
#   then, on head:   RAY_AUTH_MODE=token selfplay run --preset go9 --out runs/go9 --address auto
#   to stop a node:  cluster/deploy/start_node.sh stop
#
# Where the token is read from (Ray's order): RAY_AUTH_TOKEN (the token itself), RAY_AUTH_TOKEN_PATH
# (a file), else ~/.ray/auth_token. Token authentication does not encrypt traffic: keep the
# cluster on a private network behind a firewall (the ports are listed in docs/cluster.md).
#
# Environment: PORT (Ray's GCS port on the head, default 6379), NODE_MANAGER_PORT (default 8077),
# OBJECT_MANAGER_PORT (default 8076) and worker ports MIN_WORKER_PORT..MAX_WORKER_PORT (default
# 10002..19999) — fixed so that a firewall can allow exactly them between the cluster's machines;
# HEAD_RESERVED_CPUS (CPUs the head keeps for the buffer, learner and snapshot store; default 2),
# NODE_IP (this machine's address as the other nodes reach it; Ray guesses it when unset). A worker
# that joins while a run is going gets workers within `run.top_up_seconds` (10 s by default).
set -euo pipefail

PORT="${PORT:-6379}"
role="${1:-}"
export RAY_AUTH_MODE=token
ip_args=()
if [ -n "${NODE_IP:-}" ]; then
    ip_args=(--node-ip-address "$NODE_IP")
fi
port_args=(--node-manager-port="${NODE_MANAGER_PORT:-8077}" --object-manager-port="${OBJECT_MANAGER_PORT:-8076}"
           --min-worker-port="${MIN_WORKER_PORT:-10002}" --max-worker-port="${MAX_WORKER_PORT:-19999}")

have_token() {
    [ -n "${RAY_AUTH_TOKEN:-}" ] || [ -s "${RAY_AUTH_TOKEN_PATH:-$HOME/.ray/auth_token}" ]
}

case "$role" in
    head)
        if ! have_token; then
            ray get-auth-token --generate >/dev/null
            echo "made a new Ray token in ~/.ray/auth_token; copy it to every worker machine"
        fi
        cpus=$(nproc)
        reserved="${HEAD_RESERVED_CPUS:-2}"
        workers=$(( cpus > reserved ? cpus - reserved : 1 ))
        ray start --head --port="$PORT" --num-cpus="$workers" --dashboard-host=127.0.0.1 \
            "${port_args[@]}" "${ip_args[@]}"
        echo "head started (token authentication on); workers join with: $0 worker $(hostname -I 2>/dev/null | awk '{print $1}')"
        ;;
    worker)
        head="${2:?usage: $0 worker HEAD_HOST}"
        if ! have_token; then
            echo "no Ray token here: copy the head's ~/.ray/auth_token to ~/.ray/auth_token (or set RAY_AUTH_TOKEN_PATH)" >&2
            exit 2
        fi
        ray start --address="$head:$PORT" "${port_args[@]}" "${ip_args[@]}"
        ;;
    stop)
        ray stop
        ;;
    *)
        echo "usage: $0 head | worker HEAD_HOST | stop" >&2
        exit 2
        ;;
esac
