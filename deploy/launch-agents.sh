#!/usr/bin/env bash
# Start the agents of an inventory over ssh (each host needs swarmrig on its PATH).
# Usage: deploy/launch-agents.sh INVENTORY.toml
set -euo pipefail
inventory=${1:?usage: launch-agents.sh INVENTORY.toml}
python3 - "$inventory" <<'PY' | while read -r host join agent; do
import sys, tomllib
inv = tomllib.load(open(sys.argv[1], "rb"))
for h in inv["host"]:
    for a in h["agents"]:
        print(h["address"], inv["coordinator"], a)
PY
  echo "starting agent $agent on $host"
  # -n: do not read our stdin; the agent exits by itself when the coordinator is gone
  ssh -n "$host" "nohup swarmrig node --join $join --agent $agent >/tmp/swarmrig-agent-$agent.log 2>&1 &"
done
