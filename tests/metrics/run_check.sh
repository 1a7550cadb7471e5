#!/usr/bin/env bash
# The metrics endpoint read by an outside parser, end to end: a venv with the Prometheus
# project's Python client (pinned in requirements.txt), a release build, `convoy serve` with
# gRPC and metrics on free loopback ports, a few `convoy predict` calls (good and bad), then
# check_exposition.py on the live /metrics page. The server is stopped on any exit.
# Not part of `cargo test`: it needs Python and PyPI.
#
# Usage: tests/metrics/run_check.sh
set -euo pipefail

here=$(cd "$(dirname "${BASH_SOURCE[0]}")" && pwd)
root=$(cd "$here/../.." && pwd)
cd "$root"

venv=target/metrics-venv
log=target/metrics-server.log
page=target/metrics-page.txt
server_pid=""

cleanup() {
    local rc=$?
    if [[ -n "$server_pid" ]] && kill -0 "$server_pid" 2>/dev/null; then
        kill "$server_pid" 2>/dev/null || true
        # SIGTERM is a graceful stop; give it 10 s, then force it.
        for _ in $(seq 1 100); do kill -0 "$server_pid" 2>/dev/null || break; sleep 0.1; done
        kill -9 "$server_pid" 2>/dev/null || true
        wait "$server_pid" 2>/dev/null || true
    fi
    if [[ $rc -ne 0 && -f "$log" ]]; then
        echo "--- server log ($log) ---" >&2
        tail -n 40 "$log" >&2
    fi
    exit "$rc"
}
trap cleanup EXIT
trap 'exit 130' INT
trap 'exit 143' TERM

echo "== python venv ($venv)"
[[ -x "$venv/bin/python" ]] || python3 -m venv "$venv"
"$venv/bin/python" -m pip install --quiet --disable-pip-version-check -r "$here/requirements.txt"

echo "== cargo build --release"
cargo build --release --quiet

# Two free loopback ports from the kernel; another process could take one before convoy binds
# it, in which case the server exits and the wait below reports it.
read -r grpc_port metrics_port < <("$venv/bin/python" -c '
import socket
a, b = socket.socket(), socket.socket()
a.bind(("127.0.0.1", 0)); b.bind(("127.0.0.1", 0))
print(a.getsockname()[1], b.getsockname()[1])')
grpc="127.0.0.1:$grpc_port"
metrics="127.0.0.1:$metrics_port"

echo "== target/release/convoy serve --listen $grpc --metrics-listen $metrics"
NO_COLOR=1 target/release/convoy serve --listen "$grpc" --metrics-listen "$metrics" >"$log" 2>&1 &
server_pid=$!

# The gRPC port opens after the models are loaded, the metrics port before: wait for both.
ready=""
for _ in $(seq 1 240); do  # 240 × 0.25 s = 60 s
    if ! kill -0 "$server_pid" 2>/dev/null; then
        echo "run_check.sh: the server exited before it listened" >&2
        exit 1
    fi
    if (exec 3<>"/dev/tcp/127.0.0.1/$grpc_port") 2>/dev/null \
        && (exec 3<>"/dev/tcp/127.0.0.1/$metrics_port") 2>/dev/null; then
        ready=1
        break
    fi
    sleep 0.25
done
[[ -n "$ready" ]] || { echo "run_check.sh: $grpc and $metrics not both listening after 60 s" >&2; exit 1; }

samples=(models/stamped-parts/samples/*.png)
echo "== convoy predict: ${#samples[@]} images, then 1, then 2 (3 good requests)"
first=$(target/release/convoy predict --server "$grpc" "${samples[@]}")
echo "$first" | head -n 1
target/release/convoy predict --server "$grpc" "${samples[0]}" >/dev/null
target/release/convoy predict --server "$grpc" "${samples[1]}" "${samples[2]}" >/dev/null
ok_samples=$(( ${#samples[@]} + 3 ))
# The first line reads "model NAME version V".
model=$(echo "$first" | awk 'NR == 1 { print $2 }')
version=$(echo "$first" | awk 'NR == 1 { print $4 }')

echo "== convoy predict: 2 bad requests (a text file as an image; an unknown model)"
if target/release/convoy predict --server "$grpc" models/stamped-parts/labels.txt; then
    echo "run_check.sh: a text file was accepted as an image" >&2; exit 1
fi
if target/release/convoy predict --server "$grpc" --model no-such-model "${samples[0]}"; then
    echo "run_check.sh: an unknown model answered" >&2; exit 1
fi

echo "== GET http://$metrics/metrics (saved to $page)"
curl -sS --max-time 10 -o "$page" "http://$metrics/metrics"
echo "$(wc -l <"$page") lines"

echo "== check_exposition.py (prometheus_client $("$venv/bin/python" -c 'import importlib.metadata as m; print(m.version("prometheus_client"))'))"
"$venv/bin/python" "$here/check_exposition.py" --url "http://$metrics/metrics" \
    --model "$model" --version "$version" \
    --ok-requests 3 --ok-samples "$ok_samples" --failed-requests 2
echo "== ok"
