#!/bin/bash
# Idle CPU of two retuner checkouts' daemons side by side on one JACK server (dummy driver, 48 kHz,
# 128-frame periods), measured per thread from /proc over SECONDS: the same conditions for both,
# unlike `retuner bench --jack --against`, which measures one after the other.
# usage: tools/idle_side_by_side.sh OLD_CHECKOUT NEW_CHECKOUT [SECONDS] [PYTHON]
set -u
old=$1 new=$2 secs=${3:-60} py=${4:-python3}
tmp=$(mktemp -d)
export JACK_DEFAULT_SERVER=retuner-idle-$$ JACK_NO_START_SERVER=1
jackd -n "$JACK_DEFAULT_SERVER" --no-realtime -d dummy -r 48000 -p 128 > "$tmp/jackd.log" 2>&1 & jp=$!
sleep 2
mkdir -p "$tmp/a" "$tmp/b"
XDG_RUNTIME_DIR=$tmp/a PYTHONPATH=$old "$py" -m retuner run --virtual --backend jack --client-name idle-old \
    --no-control-socket --status-interval 0 > "$tmp/old.log" 2>&1 & op=$!
XDG_RUNTIME_DIR=$tmp/b PYTHONPATH=$new "$py" -m retuner run --virtual --backend jack --client-name idle-new \
    --no-control-socket --status-interval 0 > "$tmp/new.log" 2>&1 & np=$!
sleep 5
ticks() { cat /proc/"$1"/task/*/stat 2>/dev/null | awk '{s += $14 + $15} END {print s + 0}'; }
o1=$(ticks $op) n1=$(ticks $np)
sleep "$secs"
o2=$(ticks $op) n2=$(ticks $np)
hz=$(getconf CLK_TCK)
awk -v a="$o1" -v b="$o2" -v c="$n1" -v d="$n2" -v t="$secs" -v hz="$hz" \
    'BEGIN {printf "idle over %d s, %% of a core: old %.2f, new %.2f\n", t, 100*(b-a)/hz/t, 100*(d-c)/hz/t}'
kill $op $np 2>/dev/null; wait $op $np 2>/dev/null
kill $jp; wait $jp 2>/dev/null
rm -rf "$tmp"
