"""Load any mixscore deployment with scoring requests, and the same load on /healthz.

Points are the model's own samples (POST .../samples), sent in batches to a scoring
endpoint by wrk (Debian package `wrk`) for a fixed time; then the same concurrency
and time against /healthz, the floor of the same server. The report gives throughput,
p50/p95/p99 latency and errors of both, and scoring throughput as a ratio of the floor.

    python loadtests/load.py --model turbines [--url http://127.0.0.1:8000]
        [--api-key KEY | MIXSCORE_LOAD_API_KEY] [--batch 100] [--concurrency 16]
        [--duration 10] [--format json|msgpack|packed] [--endpoint log-density]

Loopback only unless --allow-remote; a run lasts at most 10 minutes. Exit status 1
when any request failed.
"""

from __future__ import annotations

import argparse
import ipaddress
import math
import os
import socket
import sys
from urllib.parse import urlsplit

import httpx
import msgspec
import numpy as np
import wrk_driver

MAX_DURATION_S = 600
ENDPOINTS = ("log-density", "responsibilities", "conditional")
MSGPACK = "application/msgpack"


def parse_args(argv: list[str] | None) -> argparse.Namespace:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--url", default="http://127.0.0.1:8000", help="base URL of the API")
    parser.add_argument("--api-key", default=os.environ.get("MIXSCORE_LOAD_API_KEY", ""),
                        help="API key with the score scope (or MIXSCORE_LOAD_API_KEY)")
    parser.add_argument("--model", required=True, help="model to score (its serving version)")
    parser.add_argument("--batch", type=int, default=100, help="points per request")
    parser.add_argument("--concurrency", type=int, default=16, help="open connections")
    parser.add_argument("--duration", type=float, default=10.0, help="seconds per phase")
    parser.add_argument("--format", choices=["json", "msgpack", "packed"], default="json",
                        help="JSON lists, MessagePack lists or MessagePack packed arrays")
    parser.add_argument("--endpoint", choices=ENDPOINTS, default="log-density")
    parser.add_argument("--allow-remote", action="store_true",
                        help="allow a target that is not this machine")
    args = parser.parse_args(argv)
    if not 0 < args.duration <= MAX_DURATION_S:
        parser.error(f"--duration must be in (0, {MAX_DURATION_S}]")
    if args.batch < 1 or args.concurrency < 1:
        parser.error("--batch and --concurrency must be at least 1")
    if not args.allow_remote and not is_loopback(args.url):
        parser.error(f"{args.url} is not this machine; pass --allow-remote to load it")
    return args


def is_loopback(url: str) -> bool:
    host = urlsplit(url).hostname or ""
    try:
        return ipaddress.ip_address(socket.gethostbyname(host)).is_loopback
    except OSError:
        return False


def body(points: list[list[float]], fmt: str) -> tuple[bytes, str]:
    """The request body; NaN marks a missing feature (null in JSON)."""
    if fmt == "json":
        rows = [[None if math.isnan(x) else x for x in point] for point in points]
        return msgspec.json.encode({"points": rows}), "application/json"
    if fmt == "msgpack":
        return msgspec.msgpack.encode({"points": points}), MSGPACK
    array = np.asarray(points, dtype="<f8")
    return msgspec.msgpack.encode({"points": {
        "dtype": "<f8", "shape": list(array.shape), "data": array.tobytes()}}), MSGPACK


def model_points(args: argparse.Namespace) -> list[list[float]]:
    """``batch`` samples of the model: realistic points of the right dimension."""
    headers = {"Authorization": f"Bearer {args.api_key}"} if args.api_key else {}
    answer = httpx.post(f"{args.url}/v1/models/{args.model}/samples", headers=headers,
                        json={"count": args.batch, "seed": 1}, timeout=30)
    if answer.status_code != 200:
        sys.exit(f"load.py: cannot sample {args.model!r}: {answer.status_code} {answer.text}")
    return answer.json()["points"]  # type: ignore[no-any-return]


def report(name: str, run: wrk_driver.Run, points_per_request: int) -> None:
    points = f"{run.rps * points_per_request:11.0f}" if points_per_request else f"{'':>11s}"
    print(f"{name:28s} {run.rps:9.0f} {points} {run.p50_ms:8.2f} {run.p95_ms:8.2f} "
          f"{run.p99_ms:8.2f} {run.errors:7d}")


def main(argv: list[str] | None = None) -> int:
    args = parse_args(argv)
    if not wrk_driver.available():
        print("load.py needs wrk: apt-get install wrk", file=sys.stderr)
        return 2
    points = model_points(args)
    if args.endpoint == "conditional":  # the last feature missing, to be filled in
        points = [[*point[:-1], math.nan] for point in points]
    content, media_type = body(points, args.format)
    scoring = wrk_driver.run(f"{args.url}/v1/models/{args.model}/{args.endpoint}",
                             args.duration, args.concurrency, content, media_type, args.api_key)
    floor = wrk_driver.run(f"{args.url}/healthz", args.duration, args.concurrency)
    print(f"{args.url}: {args.concurrency} connections, {args.duration:g} s per phase, "
          f"{args.batch} point(s) per request in {args.format}")
    print(f"{'phase':28s} {'req/s':>9s} {'points/s':>11s} {'p50 ms':>8s} {'p95 ms':>8s} "
          f"{'p99 ms':>8s} {'errors':>7s}")
    report(f"{args.endpoint}", scoring, args.batch)
    report("GET /healthz (floor)", floor, 0)
    print(f"scoring requests / floor requests: {scoring.rps / floor.rps:.2f}")
    return 1 if scoring.errors or floor.errors else 0


if __name__ == "__main__":
    sys.exit(main())
