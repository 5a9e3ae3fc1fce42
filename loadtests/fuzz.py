"""A longer fuzzing run than the test suite's: schemathesis against a real server.

Starts an embedded redis-server and `mixscore serve` on 127.0.0.1 with an admin key,
imports one model, and runs `schemathesis run` over every operation of the served
OpenAPI document (all phases: examples, coverage, fuzzing, stateful; valid and
invalid data), with the checks the suite uses: no 5xx, documented statuses, media
types, bodies and headers, and no request let through without a valid key.

Run:  python loadtests/fuzz.py [--examples N] [--max-time S] [--seed N]
Exit status: schemathesis's (non-zero when it found a failure). Loopback only.
"""

from __future__ import annotations

import argparse
import json
import subprocess
import sys
import tempfile
from pathlib import Path

import httpx

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from local_service import local_service

from service.auth import new_key

CHECKS = ("not_a_server_error,status_code_conformance,content_type_conformance,"
          "response_schema_conformance,response_headers_conformance,ignored_auth")


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--examples", type=int, default=200, help="per operation and phase")
    parser.add_argument("--max-time", type=int, default=600, help="seconds for the whole run")
    parser.add_argument("--seed", type=int, default=1)
    args = parser.parse_args()
    token, entry = new_key("fuzzer", ["admin"])
    with tempfile.TemporaryDirectory(prefix="mixscore-fuzz-") as folder:
        keys = Path(folder) / "keys.json"
        keys.write_text(json.dumps({"keys": [entry.to_json()]}))
        with local_service({"MIXSCORE_API_KEYS_FILE": str(keys)}) as local:
            httpx.post(f"{local.url}/v1/models/example/versions",
                       headers={"Authorization": f"Bearer {token}"},
                       json={"structure": "spherical", "weights": [0.7, 0.3],
                             "means": [[0, 0], [6, 6]], "covariances": [1, 2]}
                       ).raise_for_status()
            return subprocess.run(
                [sys.executable, "-m", "schemathesis.cli", "run", f"{local.url}/openapi.json",
                 "--checks", CHECKS, "--max-examples", str(args.examples), "--header",
                 f"Authorization: Bearer {token}", "--max-time", str(args.max_time),
                 "--seed", str(args.seed), "--suppress-health-check", "filter_too_much"],
                check=False).returncode

if __name__ == "__main__":
    sys.exit(main())
