"""The Dockerfile's install steps, run outside Docker (which these machines lack).

The two pip commands of deploy/Dockerfile run as written, in fresh virtual
environments, on a copy of exactly the files the Dockerfile copies; then the image's
command serves and the image's HEALTHCHECK command passes against it."""

from __future__ import annotations

import json
import os
import re
import shlex
import shutil
import subprocess
import sys
import time
import venv
from pathlib import Path

from service.embedded import EmbeddedRedis, free_port

ROOT = Path(__file__).resolve().parents[2]
DOCKERFILE = (ROOT / "deploy" / "Dockerfile").read_text()


def marked_run(mark: str) -> str:
    """The RUN command on the line after ``# mixscore:<mark>``."""
    match = re.search(rf"^# mixscore:{mark}\nRUN (.+)$", DOCKERFILE, re.MULTILINE)
    assert match, f"no '# mixscore:{mark}' step in the Dockerfile"
    return match.group(1)


def exec_form(instruction: str) -> list[str]:
    """The JSON array of the last ``instruction`` (CMD, or HEALTHCHECK ... CMD)."""
    text = DOCKERFILE.replace("\\\n", " ")
    lines = [line for line in text.splitlines() if line.startswith(instruction)]
    return json.loads(lines[-1][lines[-1].index("["):])  # type: ignore[no-any-return]


def copied_sources() -> list[str]:
    """What the wheels stage COPYs from the build context."""
    names = []
    for line in DOCKERFILE.splitlines():
        if line.startswith("COPY ") and "--from" not in line:
            names += line.split()[1:-1]
    return names


def fresh_venv(path: Path) -> Path:
    venv.create(path, with_pip=True, clear=True)
    return path / "bin"


def build_arguments() -> dict[str, str]:
    """The defaults of the Dockerfile's ARGs."""
    return dict(re.findall(r"^ARG (\w+)=(\S+)$", DOCKERFILE, re.MULTILINE))


def run_step(command: str, bin_dir: Path, wheels: Path, cwd: Path) -> None:
    command = command.split(" && ")[0]  # the image's clean-up of /wheels is not needed here
    command = command.replace("/wheels", str(wheels))
    for name, value in build_arguments().items():
        command = command.replace(f"${{{name}}}", value)
    words = shlex.split(command)
    assert words[0] == "pip"
    subprocess.run([str(bin_dir / "pip"), *words[1:]], cwd=cwd, check=True,
                   capture_output=True, timeout=600)


def test_the_image_steps_install_a_working_service(tmp_path: Path,
                                                   redis_server: EmbeddedRedis) -> None:
    context = tmp_path / "context"
    context.mkdir()
    for name in copied_sources():
        source = ROOT / name
        if source.is_dir():
            shutil.copytree(source, context / name,
                            ignore=shutil.ignore_patterns("__pycache__"))
        else:
            shutil.copy(source, context / name)
    wheels = tmp_path / "wheels"
    run_step(marked_run("build"), fresh_venv(tmp_path / "build"), wheels, context)
    final = fresh_venv(tmp_path / "final")
    run_step(marked_run("install"), final, wheels, tmp_path)

    version = subprocess.run([str(final / "mixscore"), "--version"], capture_output=True,
                             text=True, check=True)
    assert version.stdout.strip() == "mixscore 0.1.0"
    # The default extras: sources read by fit workers, and the same image as a Dask node.
    subprocess.run([str(final / "python"), "-c", "import service.distributed, pyarrow"],
                   check=True, timeout=120)
    subprocess.run([str(final / "dask"), "worker", "--help"], check=True,
                   capture_output=True, timeout=120)

    port = free_port()
    image_env = dict(pair.split("=", 1) for pair in re.search(
        r"^ENV (.+?)\n(?!\s)", DOCKERFILE.replace("\\\n", " "), re.MULTILINE
    ).group(1).split())  # type: ignore[union-attr]
    env = {"PATH": f"{final}:{os.environ['PATH']}", **image_env,
           "MIXSCORE_PORT": str(port), "MIXSCORE_REDIS_URL": redis_server.url,
           "MIXSCORE_KEY_PREFIX": "image-steps"}
    command = exec_form("CMD")
    assert command[0] == "mixscore"
    server = subprocess.Popen(command, env=env, cwd=tmp_path, stdout=subprocess.DEVNULL,
                              stderr=subprocess.DEVNULL)
    try:
        healthcheck = exec_form("HEALTHCHECK")
        assert healthcheck[0] == "python"
        deadline = time.monotonic() + 60
        while True:
            check = subprocess.run([str(final / "python"), *healthcheck[1:]], env=env,
                                   capture_output=True)
            if check.returncode == 0:
                break
            assert server.poll() is None, "the image's command stopped"
            assert time.monotonic() < deadline, check.stderr
            time.sleep(0.5)
    finally:
        server.terminate()
        server.wait(30)
    # Every dependency came as a published wheel (manylinux or pure Python): building
    # the image needs no compiler in either stage.
    compiled_here = [w.name for w in wheels.glob("*.whl")
                     if re.search(r"-linux_\w+\.whl$", w.name)]
    assert not compiled_here


def test_the_final_stage_is_slim_and_unprivileged() -> None:
    stages = re.split(r"^FROM ", DOCKERFILE, flags=re.MULTILINE)[1:]
    assert len(stages) == 2, "multi-stage: wheels, then the runtime"
    runtime = stages[1]
    assert stages[0].startswith("${PYTHON_IMAGE} AS wheels")
    # The same Python minor version as the one these tests run the steps with.
    minor = f"python:{sys.version_info.major}.{sys.version_info.minor}-slim"
    assert re.search(rf"^ARG PYTHON_IMAGE={re.escape(minor)}", DOCKERFILE, re.MULTILINE)
    assert "COPY --from=wheels /wheels /wheels" in runtime
    assert not re.search(r"apt-get|gcc|build-essential", runtime)
    user = re.search(r"^USER (\S+)$", runtime, re.MULTILINE)
    assert user and user.group(1) not in ("root", "0")
    assert re.search(r"^HEALTHCHECK ", runtime, re.MULTILINE)
