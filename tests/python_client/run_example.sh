#!/usr/bin/env bash
# Runs client_example.py against a real convoy server, end to end:
# venv + pinned packages, stubs from our proto, release build, server on a free loopback
# port, the client, an optional check of the top class. The server is stopped on any exit.
#
# Usage: tests/python_client/run_example.sh [--models DIR] [--image FILE] [--expect LABEL]
#   --models DIR    folder of .cvb bundles (default: the demo model built into the binary)
#   --image FILE    image to classify (default: models/stamped-parts/samples/sound-1.png)
#   --expect LABEL  fail unless LABEL is the top-ranked class
set -euo pipefail

here=$(cd "$(dirname "${BASH_SOURCE[0]}")" && pwd)
root=$(cd "$here/../.." && pwd)

# Paths given on the command line are relative to where the script was started.
absolute() { if [[ "$1" = /* ]]; then echo "$1"; else echo "$PWD/$1"; fi; }
models=""
image=""
expect=""
while [[ $# -gt 0 ]]; do
    case "$1" in
        --models) models=$(absolute "${2:?--models needs a folder}"); shift 2 ;;
        --image) image=$(absolute "${2:?--image needs a file}"); shift 2 ;;
        --expect) expect=${2:?--expect needs a label}; shift 2 ;;
        -h|--help) sed -n '2,9p' "$here/run_example.sh"; exit 0 ;;
        *) echo "run_example.sh: unknown argument $1" >&2; exit 2 ;;
    esac
done
cd "$root"
image=${image:-models/stamped-parts/samples/sound-1.png}
[[ -f "$image" ]] || { echo "run_example.sh: no image at $image" >&2; exit 1; }
[[ -z "$models" || -d "$models" ]] || { echo "run_example.sh: no folder $models" >&2; exit 1; }

venv=target/py-client-venv
stubs=target/py-client-stubs
log=target/py-client-server.log
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

echo "== stubs ($stubs)"
rm -rf "$stubs"
mkdir -p "$stubs"
"$venv/bin/python" -m grpc_tools.protoc -I proto \
    --python_out="$stubs" --grpc_python_out="$stubs" proto/convoy/v1/predictor.proto

echo "== cargo build --release"
cargo build --release --quiet

# Ask the kernel for a free loopback port; another process could take it before convoy binds
# it, in which case the server exits and the wait below reports it.
port=$("$venv/bin/python" -c 'import socket; s = socket.socket(); s.bind(("127.0.0.1", 0)); print(s.getsockname()[1])')
addr="127.0.0.1:$port"
serve_args=(serve --listen "$addr")
[[ -n "$models" ]] && serve_args+=(--models "$models")

echo "== target/release/convoy ${serve_args[*]}"
NO_COLOR=1 target/release/convoy "${serve_args[@]}" >"$log" 2>&1 &
server_pid=$!

# convoy binds the port only after its models are loaded, so an answering port means ready.
ready=""
for _ in $(seq 1 240); do  # 240 × 0.25 s = 60 s
    if ! kill -0 "$server_pid" 2>/dev/null; then
        echo "run_example.sh: the server exited before it listened" >&2
        exit 1
    fi
    if (exec 3<>"/dev/tcp/127.0.0.1/$port") 2>/dev/null; then ready=1; break; fi
    sleep 0.25
done
[[ -n "$ready" ]] || { echo "run_example.sh: nothing listening on $addr after 60 s" >&2; exit 1; }

echo "== client_example.py $image $addr"
out=target/py-client-output.txt
PYTHONPATH="$stubs" "$venv/bin/python" "$here/client_example.py" "$image" "$addr" | tee "$out"

if [[ -n "$expect" ]]; then
    top=$(awk '$1 == "1." { print $2; exit }' "$out")
    if [[ "$top" != "$expect" ]]; then
        echo "run_example.sh: top class is '${top}', expected '${expect}'" >&2
        exit 1
    fi
    echo "== top class is $expect, as expected"
fi
echo "== ok"
