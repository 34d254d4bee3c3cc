"""Harness for the DDS tests: the package's executables as OS processes, one isolated domain.

Every session gets a random ROS_DOMAIN_ID with localhost-only discovery (set before
rclpy starts in this process, and passed to every node process), every node runs with a
timeout and is stopped by its process group, and a failing test shows the nodes' logs.
"""

from __future__ import annotations

import os
import random

import pytest

rclpy = pytest.importorskip("rclpy", reason="rclpy is not installed (pip install '.[ros]' or source ROS 2)")

from linz_ros.artifact import load_artifact  # noqa: E402
from linz_ros.bringup import Bringup, isolated_environment  # noqa: E402
from linz_ros.codegen import artifact_path, build_document, write_artifact  # noqa: E402
from linz_ros.model import load_plant  # noqa: E402
from linz_ros.synthesis import synthesise  # noqa: E402

from dds_harness import ROOT  # noqa: E402


@pytest.fixture(scope="session")
def domain_id():
    """One random DDS domain for the session, localhost only (each probe joins it with a context of its own)."""
    domain = random.SystemRandom().randint(1, 101)
    os.environ["ROS_DOMAIN_ID"] = str(domain)
    os.environ["ROS_AUTOMATIC_DISCOVERY_RANGE"] = "LOCALHOST"
    os.environ["FASTDDS_BUILTIN_TRANSPORTS"] = "UDPv4"      # as isolated_environment gives the nodes
    yield domain


@pytest.fixture(scope="session")
def arm_artifact(tmp_path_factory):
    """The pick arm's artifact, built once for the session."""
    folder = tmp_path_factory.mktemp("artifacts")
    design = synthesise(load_plant(ROOT / "config" / "plants" / "pick_arm.yaml"))
    path = write_artifact(build_document(design, points=16)[0], artifact_path(folder, "pick_arm"))
    return path, load_artifact(path)


@pytest.fixture
def bringup(domain_id, tmp_path, request):
    """A Bringup in the session's domain; on failure the node logs are printed."""
    instance = Bringup(tmp_path / "logs", isolated_environment(domain_id))
    yield instance
    instance.stop_all(timeout=5.0)
    report = getattr(request.node, "rep_call", None)
    if report is not None and report.failed:
        for node in instance.nodes.values():
            print(f"\n----- {node.name} ({' '.join(node.argv)}) -----\n{node.log_text()[-4000:]}")


@pytest.hookimpl(hookwrapper=True)
def pytest_runtest_makereport(item, call):
    outcome = yield
    report = outcome.get_result()
    setattr(item, f"rep_{report.when}", report)
