"""The ``mixscore`` command: serve, worker, up, keys, openapi.

The parent process imports neither the app nor the metrics, so that settings such
as PROMETHEUS_MULTIPROC_DIR are in place before any worker starts.
"""

from __future__ import annotations

import argparse
import logging
import os
import shutil
import subprocess
import sys
import tempfile
from importlib.metadata import version
from pathlib import Path

from . import keys_command
from .logs import configure as configure_logs
from .settings import Settings, SettingsError

log = logging.getLogger("mixscore")
LOOPBACK = ("127.0.0.1", "localhost", "::1")
APP_FACTORY = "service.app:create_app"
#: How long `up` waits for its worker to hand back a running job at Ctrl-C.
WORKER_STOP_TIMEOUT_S = 30
#: How long an API process may finish its requests in flight once told to stop. Below
#: Kubernetes' 30 s grace period less the preStop pause.
DRAIN_TIMEOUT_S = 20


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(
        prog="mixscore",
        description="Probabilistic scoring with Gaussian mixture models, served over HTTP. "
                    "Settings come from MIXSCORE_* environment variables (see README.md).")
    parser.add_argument("--version", action="version", version=f"mixscore {version('mixscore')}")
    commands = parser.add_subparsers(dest="command", required=True)

    serve = commands.add_parser("serve", help="run the HTTP API (Redis given by "
                                              "MIXSCORE_REDIS_URL)")
    serve.add_argument("--host", help="address to listen on (default: MIXSCORE_HOST or "
                                      "127.0.0.1)")
    serve.add_argument("--port", type=int, help="port (default: MIXSCORE_PORT or 8000)")
    serve.add_argument("--workers", type=int, default=1, help="worker processes (default: 1)")

    up = commands.add_parser("up", help="embedded Redis + fit worker + API on this machine, "
                                        "for a laptop or CI")
    up.add_argument("--port", type=int, help="port (default: MIXSCORE_PORT or 8000)")
    up.add_argument("--data-dir", help="folder of the embedded Redis's data (default: "
                                       "MIXSCORE_DATA_DIR or ./data)")
    up.add_argument("--no-demo", action="store_true",
                    help="do not fit and serve the wind-farm demo model")

    demo = commands.add_parser("demo", help="the wind-farm scenario against a running "
                                            "service: fit, promote, score a day")
    demo.add_argument("--url", help="base URL (default: http://127.0.0.1:MIXSCORE_PORT)")
    demo.add_argument("--api-key", help="a key with the admin scope, when keys are set")
    demo.add_argument("--fit-only", action="store_true",
                      help="only make sure the model is fitted and serving")
    demo.add_argument("--refit", action="store_true",
                      help="fit again even if the model already serves a version")

    worker = commands.add_parser("worker", help="take fit jobs from the queue (Redis given "
                                                "by MIXSCORE_REDIS_URL)")
    worker.add_argument("--burst", action="store_true",
                        help="stop when the queue is empty (for tests and batch runs)")

    keys_command.add_parser(commands)

    schema = commands.add_parser("openapi", help="write the OpenAPI document")
    schema.add_argument("--output", default="openapi/openapi.json",
                        help="file to write, or - for standard output")

    args = parser.parse_args(argv)
    try:
        settings = Settings.from_env()
        configure_logs(settings.log_level)
        if args.command == "serve":
            return run_server(settings, args.host or settings.host, args.port or settings.port,
                              args.workers)
        if args.command == "worker":
            from .worker import run_worker

            return run_worker(settings, args.burst)
        if args.command == "keys":
            return keys_command.run(settings, args)
        if args.command == "up":
            return run_up(settings, args.port or settings.port,
                          Path(args.data_dir or settings.data_dir), demo=not args.no_demo)
        if args.command == "demo":
            from .client import ProblemError
            from .demo import run_demo

            try:
                return run_demo(args.url or f"http://127.0.0.1:{settings.port}", args.api_key,
                                args.fit_only, args.refit)
            except KeyboardInterrupt:  # Ctrl-C, also when `up` stops while it fits
                print("\nmixscore demo: stopped", file=sys.stderr)
                return 130
            except ProblemError as error:
                print(f"mixscore demo: {error}", file=sys.stderr)
                return 1
        return write_openapi(args.output)
    except SettingsError as error:
        print(f"mixscore: {error}", file=sys.stderr)
        return 2


def run_server(settings: Settings, host: str, port: int, workers: int) -> int:
    """uvicorn on uvloop and httptools, chosen by measurement (README, Performance)."""
    import uvicorn  # a heavy import, for this command only

    from .auth import KeyRing

    if workers < 1:
        raise SettingsError(f"--workers must be at least 1; got {workers}")
    if KeyRing.from_settings(settings).empty and host not in LOOPBACK:
        log.warning("no API keys are configured, so mixscore listens on 127.0.0.1 instead of "
                    "%s; set MIXSCORE_API_KEYS_FILE to listen elsewhere", host)
        host = "127.0.0.1"
    if workers > 1:
        _fresh_multiprocess_dir()
    log.info("mixscore %s listening on http://%s:%d with %d worker(s); Redis at %s",
             version("mixscore"), host, port, workers, _redacted(settings.redis_url))
    # The access log is ours (service.logs.AccessLog); the Server header names no product.
    uvicorn.run(APP_FACTORY, factory=True, host=host, port=port, workers=workers,
                loop="uvloop", http="httptools", lifespan="on",
                log_config=configure_logs(settings.log_level), access_log=False,
                server_header=False, timeout_graceful_shutdown=DRAIN_TIMEOUT_S)
    return 0


def _fresh_multiprocess_dir() -> None:
    """Metrics of several workers are merged from files in a folder wiped at start."""
    folder = os.environ.get("PROMETHEUS_MULTIPROC_DIR") or tempfile.mkdtemp(
        prefix="mixscore-metrics-")
    shutil.rmtree(folder, ignore_errors=True)
    Path(folder).mkdir(parents=True)
    os.environ["PROMETHEUS_MULTIPROC_DIR"] = folder


def _redacted(url: str) -> str:
    """The Redis URL without its password, for the log."""
    if "@" not in url:
        return url
    scheme, rest = url.split("://", 1)
    return f"{scheme}://***@{rest.split('@', 1)[1]}"


def run_up(settings: Settings, port: int, data_dir: Path, demo: bool) -> int:
    """A real redis-server (unless MIXSCORE_REDIS_URL is set), a fit worker and the API,
    in the foreground, and the demo model fitted in the background; Ctrl-C stops all."""
    from .embedded import EmbeddedRedis

    redis = None
    if not os.environ.get("MIXSCORE_REDIS_URL"):
        redis = EmbeddedRedis(data_dir / "redis")
        os.environ["MIXSCORE_REDIS_URL"] = redis.start()
        log.info("embedded redis-server on %s, append-only data in %s", redis.url,
                 redis.data_dir)
        settings = Settings.from_env()
    worker = subprocess.Popen([sys.executable, "-m", "service.cli", "worker"])
    helpers = [worker]
    if demo:
        helpers.append(subprocess.Popen([sys.executable, "-m", "service.cli", "demo", "--url",
                                         f"http://127.0.0.1:{port}", "--fit-only"]))
    print(banner(port, demo), flush=True)
    try:
        return run_server(settings, "127.0.0.1", port, 1)
    finally:
        for helper in reversed(helpers):
            helper.terminate()  # the worker hands a running fit back to the queue
            helper.wait(WORKER_STOP_TIMEOUT_S)
        if redis is not None:
            redis.stop()
            log.info("embedded redis-server stopped; its data stays in %s", redis.data_dir)


def banner(port: int, demo: bool) -> str:
    url = f"http://127.0.0.1:{port}"
    json = "-H 'Content-Type: application/json'"
    head = f"""
mixscore is starting on {url}
  API reference: {url}/docs (OpenAPI: {url}/openapi.json)
  health: {url}/healthz   metrics: {url}/metrics
"""
    if not demo:
        model = ('{"structure": "spherical", "weights": [0.7, 0.3], "means": [[0, 0], [6, 6]], '
                 '"covariances": [1, 2]}')
        return head + f"""
Try it:
  curl -s -X POST {url}/v1/models/example/versions {json} \\
    -d '{model}'
  curl -s -X POST {url}/v1/models/example/log-density {json} \\
    -d '{{"points": [[0.3, -0.2], [9, -4], [null, 5.5]]}}'
  curl -s {url}/v1/models/example
"""
    # wind m/s, power kW, rotor rpm, gearbox oil C, ambient C, vibration mm/s
    normal, hot, gap = ("[14.2, 1985, 16.0, 51.5, 9.0, 2.9]", "[14.2, 1985, 16.0, 68.0, 9.0, 2.9]",
                        "[7.5, 520, 10.5, 33.0, 9.0, null]")
    return head + f"""
The demo model "wind-farm" is being fitted in the background (about 20 s on 2 cores);
`mixscore demo` shows the whole scenario. Once it serves, try:
  curl -s {url}/v1/models/wind-farm
  curl -s -X POST {url}/v1/models/wind-farm/log-density {json} \\
    -d '{{"points": [{normal}, {hot}]}}'
  curl -s -X POST {url}/v1/models/wind-farm/conditional {json} \\
    -d '{{"points": [{gap}]}}'
"""


def write_openapi(output: str) -> int:
    from .openapi import document_bytes

    if output == "-":
        sys.stdout.buffer.write(document_bytes())
        return 0
    path = Path(output)
    path.parent.mkdir(parents=True, exist_ok=True)
    path.write_bytes(document_bytes())
    print(f"wrote {path}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
