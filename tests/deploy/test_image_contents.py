"""What the image installs is complete: a package built from exactly the files the
Containerfile's build stage copies serves requests with the gunicorn config it copies.

No container engine runs in CI, so the build stage is replayed on the host: its COPY
instructions are applied to an empty directory, setuptools' ``build_py`` (the step that
decides what goes into the wheel: packages and package data) runs there, offline, and the
result, outside the repository and without the editable install, seeds a demo store and
serves it under gunicorn on 127.0.0.1 with the image's own command-line arguments.
"""

from __future__ import annotations

import os
import shutil
import subprocess
import sys
from pathlib import Path

import pytest
import requests
from containerfile_reader import CONTAINERFILE, REPO, copy_sources, exec_form, instructions

from model_store.demo import VERSIONS as DEMO_VERSIONS
from service.choice.spec import spec_from_dict
from tests.support.payloads import situations_for
from tests.support.processes import free_port, readiness, start, wait_until, worker_pids

pytestmark = pytest.mark.slow
MODEL = "wrenmouth_commute"


def replay_build_copies(context: Path) -> Path:
    """Apply the build stage's COPY instructions (relative to its WORKDIR) under ``context``;
    returns the stage's working directory."""
    steps = [s for s in instructions(CONTAINERFILE.read_text()) if s.stage == 0]
    workdir = next(s.argument for s in steps if s.keyword == "WORKDIR")
    root = context / workdir.lstrip("/")
    root.mkdir(parents=True)
    for step in steps:
        if step.keyword != "COPY":
            continue
        sources, flags = copy_sources(step.argument)
        assert "from" not in flags
        destination = step.argument.split()[-1]
        for source in sources:
            origin = REPO / source.rstrip("/")
            if origin.is_dir():
                shutil.copytree(
                    origin,
                    root / destination.rstrip("/"),
                    ignore=shutil.ignore_patterns("__pycache__", "*.pyc"),
                )
            else:
                shutil.copy2(origin, root / destination / origin.name)
    return root


def final_stage_copy(destination: str) -> Path:
    """The repository file the final stage copies to ``destination``."""
    steps = instructions(CONTAINERFILE.read_text())
    final = max(s.stage for s in steps)
    for step in steps:
        if step.stage == final and step.keyword == "COPY" and "--from" not in step.argument:
            sources, _ = copy_sources(step.argument)
            if step.argument.split()[-1] == destination:
                return REPO / sources[0]
    raise AssertionError(f"the final stage copies nothing to {destination}")


@pytest.fixture(scope="module")
def installed(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """The package as the image installs it, in a directory of its own."""
    context = tmp_path_factory.mktemp("image")
    source = replay_build_copies(context / "build")
    lib = context / "lib"
    build = ["-q", "build_py", "--build-lib", str(lib)]
    done = subprocess.run(
        [sys.executable, "-c", "import setuptools; setuptools.setup()", *build],
        cwd=source,
        capture_output=True,
        text=True,
        timeout=120,
        check=False,
    )
    assert done.returncode == 0, done.stderr
    return lib


def image_env(lib: Path, gunicorn_conf: Path) -> dict[str, str]:
    env = {k: v for k, v in os.environ.items() if not k.startswith(("CHOICECAST_", "AWS_"))}
    env.update(
        {
            "PYTHONPATH": str(lib),
            "PYTHONDONTWRITEBYTECODE": "1",
            # The image's copy of the config, where server.run finds /etc/choicecast/... there.
            "CHOICECAST_GUNICORN_CONFIG": str(gunicorn_conf),
            # As in the image: a home directory that does not exist.
            "HOME": "/nonexistent",
        }
    )
    return env


def test_the_installed_package_comes_from_the_copied_files(installed: Path) -> None:
    for package in ("service/api", "service/choice", "model_store"):
        assert (installed / package / "__init__.py").exists(), package
    assert (installed / "service" / "cli.py").exists()
    # Nothing from outside the copied folders (tests, benchmarks) is packaged.
    assert sorted(p.name for p in installed.iterdir()) == ["model_store", "service"]


def test_the_installed_package_serves_the_demo(installed: Path, tmp_path: Path) -> None:
    gunicorn_conf = final_stage_copy("/etc/choicecast/gunicorn.conf.py")
    env = image_env(installed, gunicorn_conf)
    cli = [sys.executable, "-m", "service.cli"]
    where = subprocess.run(
        [sys.executable, "-c", "import service, model_store; print(service.__file__)"],
        env=env, cwd=tmp_path, capture_output=True, text=True, timeout=60, check=True,
    )  # fmt: skip
    assert where.stdout.strip().startswith(str(installed)), where.stdout
    store = tmp_path / "store"
    seeded = subprocess.run(
        [*cli, "demo", "--store", str(store), "--populations", str(tmp_path / "pop")],
        env=env, cwd=tmp_path, capture_output=True, text=True, timeout=120, check=False,
    )  # fmt: skip
    assert seeded.returncode == 0, seeded.stderr
    # The image's arguments, bound to 127.0.0.1 at a free port.
    steps = instructions(CONTAINERFILE.read_text())
    final = [s for s in steps if s.stage == max(t.stage for t in steps)]
    entrypoint = exec_form(next(s.argument for s in final if s.keyword == "ENTRYPOINT"))
    args = exec_form(next(s.argument for s in final if s.keyword == "CMD"))
    port = free_port()
    args[args.index("--host") + 1] = "127.0.0.1"
    args[args.index("--port") + 1] = str(port)
    assert entrypoint == ["choicecast", "serve"]
    server = start(
        "image-serve",
        [*cli, "serve", *args],
        {**env, "CHOICECAST_STORE": str(store), "PROMETHEUS_MULTIPROC_DIR": str(tmp_path / "m")},
        tmp_path,
        cwd=tmp_path,
    )
    url = f"http://127.0.0.1:{port}"
    try:
        ok = wait_until(lambda: readiness(url, timeout=2)[0] == 200, 60, interval=0.1)
        assert ok, server.log_tail()
        # gunicorn runs with the copied config and the image's worker count.
        command = Path(f"/proc/{server.pid}/cmdline").read_bytes().split(b"\0")
        assert command[command.index(b"--config") + 1] == str(gunicorn_conf).encode()
        workers = args[args.index("--workers") + 1]
        assert wait_until(lambda: len(worker_pids(server.pid)) == int(workers), 30)
        # ... and answers a scoring request for a demo model.
        spec = spec_from_dict(next(d.spec for d in DEMO_VERSIONS if d.model == MODEL))
        body = {"situations": situations_for(spec, 3, seed=1)}
        answer = requests.post(f"{url}/v1/models/{MODEL}/score", json=body, timeout=30)
        assert answer.status_code == 200, answer.text
        assert answer.json()["version"] in {"v1", "v2"}
    finally:
        server.stop()
