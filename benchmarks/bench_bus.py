"""Round trip of ``status`` through our bus vs a bare pyzmq REQ/REP exchange of the same sizes.

Both servers run as child processes on loopback; both clients run here, in blocks that
alternate between the two so that machine noise hits both alike. Prints the median time per
round trip of each and their ratio (target: ours <= 2x bare).

Run: ``python benchmarks/bench_bus.py [--rounds 2000] [--blocks 5]``
"""

from __future__ import annotations

import argparse
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import zmq

from autotune.wire import protocol
from autotune.wire.bus import BusClient

REPO = Path(__file__).resolve().parents[1]
START_TIMEOUT_S = 30.0

_ECHO_SERVER = """
import sys, zmq
size = int(sys.argv[1])
context = zmq.Context()
socket = context.socket(zmq.REP)
socket.setsockopt(zmq.LINGER, 0)
socket.bind("tcp://127.0.0.1:*")
print(socket.getsockopt_string(zmq.LAST_ENDPOINT), flush=True)
reply = b"x" * size
while True:
    if socket.poll(30000) == 0:
        break  # bounded life if the parent vanished
    socket.recv()
    socket.send(reply)
"""


def _start_rig_server(folder: Path) -> tuple[subprocess.Popen[bytes], str]:
    ready = folder / "rig.ready"
    process = subprocess.Popen(
        [sys.executable, "-m", "autotune.cli", "rig", "--bind", "tcp://127.0.0.1:0",
         "--ready-file", str(ready), "--log-level", "warning"],
        cwd=REPO, stdin=subprocess.DEVNULL, stdout=subprocess.DEVNULL,
    )
    deadline = time.monotonic() + START_TIMEOUT_S
    while not ready.exists():
        if process.poll() is not None or time.monotonic() > deadline:
            process.kill()
            raise SystemExit("the rig server did not start")
        time.sleep(0.02)
    return process, ready.read_text().strip()


def _reply_size(endpoint: str) -> tuple[int, int]:
    """Sizes of one status request and its reply on the wire, bytes."""
    request = protocol.encode_request(protocol.Op.STATUS, {}, protocol.new_msg_id())
    context = zmq.Context()
    socket = context.socket(zmq.REQ)
    socket.setsockopt(zmq.LINGER, 0)
    socket.connect(endpoint)
    socket.send(request)
    if not socket.poll(5000):
        raise SystemExit("no reply from the rig server")
    reply = socket.recv()
    socket.close()
    context.term()
    return len(request), len(reply)


def _time_ours(client: BusClient, rounds: int) -> float:
    start = time.perf_counter()
    for _ in range(rounds):
        client.status()
    return (time.perf_counter() - start) / rounds


def _time_bare(socket: zmq.Socket, request: bytes, rounds: int) -> float:
    start = time.perf_counter()
    for _ in range(rounds):
        socket.send(request)
        if not socket.poll(5000):
            raise SystemExit("no reply from the echo server")
        socket.recv()
    return (time.perf_counter() - start) / rounds


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--rounds", type=int, default=2000, help="round trips per block")
    parser.add_argument("--blocks", type=int, default=5, help="alternating blocks per side")
    args = parser.parse_args(argv)

    with tempfile.TemporaryDirectory() as folder:
        rig, rig_endpoint = _start_rig_server(Path(folder))
        echo = subprocess.Popen([sys.executable, "-c", _ECHO_SERVER, "0"], stdout=subprocess.PIPE)
        try:
            request_size, reply_size = _reply_size(rig_endpoint)
            echo.kill()
            echo.wait(5)
            echo = subprocess.Popen([sys.executable, "-c", _ECHO_SERVER, str(reply_size)], stdout=subprocess.PIPE)
            assert echo.stdout is not None
            echo_endpoint = echo.stdout.readline().decode().strip()

            context = zmq.Context()
            bare = context.socket(zmq.REQ)
            bare.setsockopt(zmq.LINGER, 0)
            bare.connect(echo_endpoint)
            request = b"x" * request_size
            ours_s, bare_s = [], []
            with BusClient(rig_endpoint, timeout_s=5.0, retries=0, backoff_s=0.0, context=context) as client:
                _time_ours(client, 200)
                _time_bare(bare, request, 200)
                for _ in range(args.blocks):
                    ours_s.append(_time_ours(client, args.rounds))
                    bare_s.append(_time_bare(bare, request, args.rounds))
            bare.close()
            context.term()
        finally:
            for process in (rig, echo):
                process.terminate()
                try:
                    process.wait(5)
                except subprocess.TimeoutExpired:
                    process.kill()

    ours, bare_median = statistics.median(ours_s), statistics.median(bare_s)
    print(f"message sizes: request {request_size} B, reply {reply_size} B; "
          f"{args.blocks} blocks of {args.rounds} round trips each, medians")
    print(f"status via BusClient + RigServer : {ours * 1e6:8.1f} us per round trip")
    print(f"bare pyzmq REQ/REP, same sizes   : {bare_median * 1e6:8.1f} us per round trip")
    print(f"ratio ours / bare                : {ours / bare_median:8.2f} (target <= 2)")
    return 0


if __name__ == "__main__":
    sys.exit(main())
