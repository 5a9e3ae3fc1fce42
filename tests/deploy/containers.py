"""Podman on these machines: a local Debian base image and the build of deploy/Dockerfile.

No container registry is reachable here, so the base the Dockerfile starts from
(``PYTHON_IMAGE``) is built from Debian packages: debootstrap, then Debian's python3,
pip and venv (with ``python`` and ``pip`` on the PATH as the slim image has them, and
pip allowed to install system-wide as there) and redis-server for a Redis container.
It is kept as a podman image, so later runs skip it. The image's pip reaches the
package index the way this machine's pip does: with the files ``pip config`` names
and the CA certificates mounted read-only into the build, nothing in the Dockerfile.
"""

from __future__ import annotations

import os
import re
import shutil
import subprocess
import sys
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[2]
#: runc: the default runtime refuses these machines' hybrid cgroups.
PODMAN = ["podman", "--runtime", "runc", "--cgroup-manager", "cgroupfs"]
#: Limits under the machine's own hard limits (higher ones are refused).
ULIMITS = ["--ulimit", "nofile=20000:20000", "--ulimit", "nproc=1000:1000"]
BASE = "localhost/mixscore-test-base:bookworm"
IMAGE = "localhost/mixscore:test"
MIRROR = os.environ.get("MIXSCORE_TEST_DEBIAN_MIRROR", "http://deb.debian.org/debian")
BASE_PACKAGES = "python3 python3-pip python3-venv redis-server ca-certificates"
BASE_TIMEOUT_S = 900
BUILD_TIMEOUT_S = 900


def missing_tools() -> list[str]:
    """What these tests need and this machine lacks (.ci/run installs it)."""
    missing = [tool for tool in ("podman", "runc", "debootstrap") if shutil.which(tool) is None]
    if os.geteuid() != 0:
        missing.append("root (debootstrap, and podman as root)")
    return missing


def podman(*args: str, timeout: float = 120, check: bool = True,
           input: bytes | None = None) -> subprocess.CompletedProcess[str]:
    done = subprocess.run([*PODMAN, *args], capture_output=True, timeout=timeout,
                          input=input, check=False)
    result = subprocess.CompletedProcess(done.args, done.returncode,
                                         done.stdout.decode(errors="replace"),
                                         done.stderr.decode(errors="replace"))
    if check and result.returncode != 0:
        raise AssertionError(f"podman {' '.join(args)} failed ({result.returncode}):\n"
                             f"{result.stdout}\n{result.stderr}")
    return result


def image_exists(name: str) -> bool:
    return podman("image", "exists", name, check=False).returncode == 0


def ensure_base(workdir: Path) -> float:
    """Build the base image unless it exists; the seconds it took (0 when cached)."""
    if image_exists(BASE):
        return 0.0
    started = time.monotonic()
    root = workdir / "root"
    _run(["debootstrap", "--variant=minbase", "bookworm", str(root), MIRROR])
    _run(["chroot", str(root), "/bin/sh", "-c",
          "export DEBIAN_FRONTEND=noninteractive; apt-get update -q && "
          f"apt-get install -y -q --no-install-recommends {BASE_PACKAGES} && "
          "apt-get clean && rm -rf /var/lib/apt/lists/* && "
          "ln -sf /usr/bin/python3 /usr/local/bin/python && "
          "ln -sf /usr/bin/pip3 /usr/local/bin/pip && "
          "rm -f /usr/lib/python3*/EXTERNALLY-MANAGED"])
    tar = subprocess.run(["tar", "-C", str(root), "-c", "."], capture_output=True, check=True,
                         timeout=BASE_TIMEOUT_S)
    podman("import", "-", BASE, input=tar.stdout, timeout=BASE_TIMEOUT_S)
    shutil.rmtree(root, ignore_errors=True)
    return time.monotonic() - started


def _run(command: list[str]) -> None:
    done = subprocess.run(command, capture_output=True, timeout=BASE_TIMEOUT_S, check=False)
    if done.returncode != 0:
        raise AssertionError(f"{' '.join(command)} failed:\n{done.stdout.decode()[-2000:]}\n"
                             f"{done.stderr.decode()[-2000:]}")


def pip_mounts() -> list[str]:
    """``-v PATH:PATH:ro`` for every file pip's configuration names on this machine:
    the configuration files, and the constraints, certificates and local wheel
    folders (or ``file://`` indexes) they point to."""
    pip = [sys.executable, "-m", "pip", "config"]
    debug = subprocess.run([*pip, "debug"], capture_output=True, text=True, check=True).stdout
    listed = subprocess.run([*pip, "list"], capture_output=True, text=True, check=True).stdout
    paths = set(re.findall(r"^\s+(/\S+), exists: True$", debug, re.MULTILINE))
    for value in re.findall(r"='([^']*)'", listed):
        for part in value.split():
            path = part.removeprefix("file://")
            if path.startswith("/") and Path(path).exists():
                paths.add(path.removesuffix("/simple") if path.endswith("/simple") else path)
    paths.add("/etc/ssl/certs")
    outermost = [path for path in sorted(paths)
                 if not any(path.startswith(other + "/") for other in paths)]
    return [flag for path in outermost for flag in ("-v", f"{path}:{path}:ro")]


def build_image() -> float:
    """Build deploy/Dockerfile from the local base; the seconds it took."""
    started = time.monotonic()
    podman("build", "--format", "docker",  # the OCI format drops HEALTHCHECK
           "--network", "host", *pip_mounts(),
           "--ignorefile", str(ROOT / "deploy" / "Dockerfile.dockerignore"),
           "--build-arg", f"PYTHON_IMAGE={BASE}", "-f", str(ROOT / "deploy" / "Dockerfile"),
           "-t", IMAGE, str(ROOT), timeout=BUILD_TIMEOUT_S)
    return time.monotonic() - started


def image_size_mb(name: str) -> float:
    return int(podman("image", "inspect", name, "--format", "{{.Size}}").stdout) / 1e6
