#!/bin/bash
# Idle CPU of two retuner checkouts' daemons under one JACK server (dummy driver, 48 kHz, 128-frame
# periods): each daemon alone on the server, OLD and NEW taking turns ROUNDS times for SECONDS each,
# so that both meet the same conditions (two daemons at once would share, and swap, JACK's order
# of clients). CPU time is each thread's time on a CPU in nanoseconds (/proc/PID/task/TID/schedstat,
# first field: kernel documentation, scheduler statistics), not the clock-tick counts of
# /proc/PID/stat, which sample a thread that runs for microseconds a period only now and then.
# usage: tools/idle_side_by_side.sh OLD_CHECKOUT NEW_CHECKOUT [SECONDS] [PYTHON] [ROUNDS]
set -u
old=$1 new=$2 secs=${3:-20} py=${4:-python3} rounds=${5:-3}
tmp=$(mktemp -d)
export JACK_DEFAULT_SERVER=retuner-idle-$$ JACK_NO_START_SERVER=1
jackd -n "$JACK_DEFAULT_SERVER" --no-realtime -d dummy -r 48000 -p 128 > "$tmp/jackd.log" 2>&1 & jp=$!
sleep 2
cpu_ns() { cat /proc/"$1"/task/*/schedstat 2>/dev/null | awk '{s += $1} END {printf "%d\n", s + 0}'; }
one() {   # one daemon of checkout $1 alone for $secs seconds: percent of a core
    mkdir -p "$tmp/run"
    XDG_RUNTIME_DIR=$tmp/run PYTHONPATH=$1 "$py" -m retuner run --virtual --backend jack --client-name idle \
        --no-control-socket --status-interval 0 > "$tmp/daemon.log" 2>&1 & local p=$!
    sleep 4
    local a b
    a=$(cpu_ns $p); sleep "$secs"; b=$(cpu_ns $p)
    kill $p 2>/dev/null; wait $p 2>/dev/null
    awk -v a="$a" -v b="$b" -v t="$secs" 'BEGIN {printf "%.3f\n", 100*(b-a)/1e9/t}'
}
olds=() news=()
for ((r = 0; r < rounds; r++)); do
    olds+=("$(one "$old")"); news+=("$(one "$new")")
done
kill $jp; wait $jp 2>/dev/null
rm -rf "$tmp"
echo "idle, % of a core, $rounds turns of $secs s each: old ${olds[*]}; new ${news[*]}"
