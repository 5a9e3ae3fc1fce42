"""The ``mixscore`` command: serve, worker, up, demo, keys, fit, openapi.

The parent process imports neither the app nor the metrics, so that settings such
as PROMETHEUS_MULTIPROC_DIR are in place before any worker starts.
"""

from __future__ import annotations

import argparse
import logging
import os
import shutil
import signal
import subprocess
import sys
import tempfile
from importlib.metadata import version
from pathlib import Path
from typing import TYPE_CHECKING

from . import fit_command, keys_command
from .logs import configure as configure_logs
from .settings import Settings, SettingsError

if TYPE_CHECKING:
    from .embedded import EmbeddedRedis

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
                                            "service: upload, fit, promote, score a day")
    demo.add_argument("--url", help="base URL (default: http://127.0.0.1:MIXSCORE_PORT)")
    demo.add_argument("--api-key", help="a key with the admin scope, when keys are set")
    demo.add_argument("--fit-only", action="store_true",
                      help="only make sure the model serves, fitting it quietly if none does")

    worker = commands.add_parser("worker", help="take fit jobs from the queue (Redis given "
                                                "by MIXSCORE_REDIS_URL)")
    worker.add_argument("--until-empty", action="store_true",
                        help="stop once no job is queued or running (for tests and batch runs)")

    keys_command.add_parser(commands)
    fit_command.add_parser(commands)

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

            return run_worker(settings, args.until_empty)
        if args.command == "keys":
            return keys_command.run(settings, args)
        if args.command == "fit":
            return fit_command.run(settings, args)
        if args.command == "up":
            return run_up(settings, args.port or settings.port,
                          Path(args.data_dir or settings.data_dir), demo=not args.no_demo)
        if args.command == "demo":
            from .client import ProblemError
            from .demo import run_demo

            try:
                return run_demo(args.url or f"http://127.0.0.1:{settings.port}", args.api_key,
                                args.fit_only)
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
    if settings.access_log != "-":
        try:
            Path(settings.access_log).open("a").close()
        except OSError as error:
            raise SettingsError(f"MIXSCORE_ACCESS_LOG: cannot append to "
                                f"{settings.access_log!r} ({error.strerror})") from None
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


class Stopped(Exception):
    """SIGTERM or SIGHUP reached `up` outside the server's own handling of them."""

    def __init__(self, signum: int) -> None:
        super().__init__(signal.Signals(signum).name)
        self.signum = signum


def _raise_stopped(signum: int, _frame: object) -> None:
    raise Stopped(signum)


def _hang_up_as_terminate(_signum: int, _frame: object) -> None:
    """SIGHUP (a closed terminal) stops the stack as SIGTERM does: while the API serves,
    the server's own SIGTERM handler drains it, and at other times `Stopped` is raised."""
    signal.raise_signal(signal.SIGTERM)


def run_up(settings: Settings, port: int, data_dir: Path, demo: bool) -> int:
    """A real redis-server (unless MIXSCORE_REDIS_URL is set), a fit worker and the API,
    in the foreground, and the demo model fitted in the background. Ctrl-C, SIGTERM and
    SIGHUP stop all of it; nothing starts when the port or the data folder is taken."""
    from .embedded import EmbeddedRedis, InUse, check_port_free

    # Installed first: uvicorn restores this handler after its graceful shutdown and raises
    # the signal again, which must unwind through the clean-up below, not end the process.
    for signum in (signal.SIGTERM, signal.SIGINT):
        signal.signal(signum, _raise_stopped)
    signal.signal(signal.SIGHUP, _hang_up_as_terminate)
    redis = None if os.environ.get("MIXSCORE_REDIS_URL") else EmbeddedRedis(data_dir / "redis")
    helpers: list[subprocess.Popen[bytes]] = []
    try:
        check_port_free(port)
        if redis is not None:
            redis.claim()
        settings = _up_settings(redis, data_dir)
        helpers.append(subprocess.Popen([sys.executable, "-m", "service.cli", "worker"]))
        if demo:
            helpers.append(subprocess.Popen([sys.executable, "-m", "service.cli", "demo",
                                             "--url", f"http://127.0.0.1:{port}", "--fit-only"]))
        print(banner(port, demo, settings.access_log), flush=True)
        return run_server(settings, "127.0.0.1", port, 1)
    except InUse as error:
        print(f"mixscore up: {error}", file=sys.stderr)
        return 1
    except Stopped as stopped:
        return 128 + stopped.signum
    finally:
        _stop_stack(helpers, redis)


def _up_settings(redis: EmbeddedRedis | None, data_dir: Path) -> Settings:
    """Start the embedded Redis if there is one; the settings the children inherit."""
    if redis is not None:
        os.environ["MIXSCORE_REDIS_URL"] = redis.start()
        log.info("embedded redis-server on %s, append-only data in %s", redis.url,
                 redis.data_dir)
    if "MIXSCORE_ACCESS_LOG" not in os.environ:  # the terminal is for the banner and warnings
        data_dir.mkdir(parents=True, exist_ok=True)
        os.environ["MIXSCORE_ACCESS_LOG"] = str(data_dir / "access.log")
    return Settings.from_env()


def _stop_stack(helpers: list[subprocess.Popen[bytes]], redis: EmbeddedRedis | None) -> None:
    """Stop the helpers, then Redis; a second stop signal must not cut this short."""
    for signum in (signal.SIGTERM, signal.SIGHUP, signal.SIGINT):
        signal.signal(signum, signal.SIG_IGN)
    for helper in reversed(helpers):
        helper.terminate()  # the worker hands a running fit back to the queue
        try:
            helper.wait(WORKER_STOP_TIMEOUT_S)
        except subprocess.TimeoutExpired:
            log.warning("process %d did not stop within %d s; killed", helper.pid,
                        WORKER_STOP_TIMEOUT_S)
            helper.kill()
            helper.wait()
    if redis is not None and redis.stop():
        log.info("embedded redis-server stopped; its data stays in %s", redis.data_dir)


def banner(port: int, demo: bool, access_log: str) -> str:
    url = f"http://127.0.0.1:{port}"
    json = "-H 'Content-Type: application/json'"
    where = "standard error" if access_log == "-" else access_log
    head = f"""
mixscore is starting on {url}
  API reference: {url}/docs (OpenAPI: {url}/openapi.json)
  health: {url}/healthz   metrics: {url}/metrics   access log: {where}
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
The demo model "wind-farm" is fitted in the background (about 20 s on 2 cores); a line
below says when it serves. `.venv/bin/mixscore demo` shows the whole scenario. Then try:
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
