"""``mixscore fit MODEL --source URI``: a fit job on files the workers read, from a shell
or a pipeline step; progress on standard error, the finished job as JSON on standard
output, exit status 0 only when the job succeeded."""

from __future__ import annotations

import argparse
import json
import sys

import msgspec

from . import schemas
from .settings import Settings


def add_parser(commands: argparse._SubParsersAction) -> None:
    fit = commands.add_parser(
        "fit", help="fit a model on Parquet, CSV or Arrow files the workers read (a source)")
    fit.add_argument("model", help="the model's name")
    fit.add_argument("--source", required=True,
                     help="a file, folder or glob, as a path or URL under the workers' "
                          "MIXSCORE_SOURCE_ROOTS")
    fit.add_argument("--format", choices=["parquet", "csv", "arrow"],
                     help="default: from the files' extension")
    fit.add_argument("--columns", help="comma-separated features, in model order (default: "
                                       "every numeric column)")
    fit.add_argument("--components", default="3",
                     help="a count, or MIN-MAX to select by --criterion (default: 3)")
    fit.add_argument("--structure", default="full",
                     help="full, diagonal, spherical or shared; comma-separated to select")
    fit.add_argument("--criterion", choices=["bic", "aic"], default="bic")
    fit.add_argument("--restarts", type=int, default=4)
    fit.add_argument("--seed", type=int, help="makes the fit reproducible")
    fit.add_argument("--no-serve", action="store_true",
                     help="keep the new version without serving it")
    fit.add_argument("--no-wait", action="store_true",
                     help="print the queued job and return at once")
    fit.add_argument("--url", help="base URL (default: http://127.0.0.1:MIXSCORE_PORT)")
    fit.add_argument("--api-key", help="a key with the fit scope, when keys are set")


def run(settings: Settings, args: argparse.Namespace) -> int:
    from .client import Client, ProblemError

    source: dict[str, object] = {"uri": args.source}
    if args.format:
        source["format"] = args.format
    if args.columns:
        source["columns"] = [name.strip() for name in args.columns.split(",") if name.strip()]
    low, _, high = args.components.partition("-")
    try:
        components: int | tuple[int, int] = (int(low), int(high)) if high else int(low)
    except ValueError:
        print(f"mixscore: --components must be a count or MIN-MAX; got {args.components!r}",
              file=sys.stderr)
        return 2
    structures = [name.strip() for name in args.structure.split(",") if name.strip()]
    options = {"source": source, "components": components,
               "structure": structures[0] if len(structures) == 1 else structures,
               "criterion": args.criterion, "restarts": args.restarts,
               "serve": not args.no_serve}
    if args.seed is not None:
        options["seed"] = args.seed

    def report(job: schemas.Job) -> None:
        progress = job.progress
        if progress is not None:
            print(f"{job.state}: candidate {progress.candidate}/"
                  f"{progress.candidates}, restart {progress.restart}, iteration "
                  f"{progress.iteration}, log-likelihood {progress.log_likelihood:.6g}",
                  file=sys.stderr)

    url = args.url or f"http://127.0.0.1:{settings.port}"
    try:
        with Client(url, api_key=args.api_key) as client:
            job = client.fit(args.model, wait=not args.no_wait, progress=report, **options)
    except ProblemError as error:
        print(f"mixscore: {error}", file=sys.stderr)
        return 1
    print(json.dumps(msgspec.to_builtins(job), indent=2))
    return 0 if args.no_wait or job.state == "succeeded" else 1
