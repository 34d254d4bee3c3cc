"""``linz campaign``: cases run as ``linz sim`` runs them, on any executor, and a rerun reproduces a case."""

from __future__ import annotations

import json
import os
import shlex
import signal
import subprocess
import sys
import threading
import time
from dataclasses import asdict
from pathlib import Path

import pytest

from linz_ros.artifact import load_artifact
from linz_ros.campaign.spec import draw_cases, read_campaign
from linz_ros.cli import parse, sim_request
from linz_ros.commands import campaign as campaign_command
from linz_ros.commands.campaign import (CampaignRequest, CaseItem, case_request, rerun_command,
                                        run_campaign, run_case)
from linz_ros.commands.sim import SimRequest
from linz_ros.errors import ConfigError
from support import BUNDLED, built_artifact_file

ROOT = Path(__file__).resolve().parent.parent
CELL = ROOT / "config" / "campaigns" / "pick_arm_cell.yaml"
PAYLOAD = ROOT / "config" / "campaigns" / "pick_arm_payload.yaml"


@pytest.fixture(scope="module")
def arm_file(tmp_path_factory):
    return built_artifact_file(BUNDLED / "pick_arm.yaml", tmp_path_factory.mktemp("arm"))


def _campaign_file(tmp_path: Path, text: str) -> str:
    path = tmp_path / f"campaign_{len(list(tmp_path.glob('campaign*.yaml')))}.yaml"
    path.write_text(text)
    return str(path)


#: A short campaign with a deliberate model error: the simulated forearm up to 60 % off.
MODEL_ERROR = """campaign:
  runs: 12
  seed: 4
  duration: 2.0
  initial: {q1: [0.0, 1.0], q2: [0.8, 2.2], w1: 0.0, w2: 0.0}
  mismatch: {m2: [-60, 60]}
  delay: [0.0, 0.003]
  noise: {q1: 1.0e-5}
"""


class _QuietBar:
    """Stands in for the progress bar: a test's hook on the progress of the runs."""

    def __init__(self, *args) -> None:
        pass

    def close(self) -> None:
        pass


def _comparable(summary: dict) -> dict:
    """The summary without what may differ between executors: where and how fast it ran, and file names."""
    return {k: v for k, v in summary.items() if k not in ("timing", "files")}


def test_a_rerun_command_parses_back_to_the_request_of_its_case(arm_file):
    artifact = load_artifact(arm_file)
    spec = read_campaign({"runs": 5, "mismatch": {"m2": [-10, 10]}, "delay": [0, 0.01], "noise": {"q1": 1e-4},
                          "references": ["step:tool_x=0.01,at=0.3"], "watchdog": {"envelope_action": "warn",
                                                                                    "divergence_time": 1}},
                         artifact, "c")
    options = SimRequest(str(arm_file), backend="python", substeps=6, force_initial=True)
    for case in draw_cases(spec):
        request = case_request(spec, case, options)
        words = shlex.split(rerun_command(request))
        assert words[:2] == ["linz", "sim"]
        parsed = sim_request(parse(words[1:]))
        assert {k: v for k, v in asdict(parsed).items() if k not in ("plots", "progress", "design", "out")} == \
            {k: v for k, v in asdict(request).items() if k not in ("plots", "progress", "design", "out")}


def test_a_model_error_campaign_finds_failures_and_a_rerun_reproduces_the_worst_exactly(arm_file, tmp_path):
    run = run_campaign(CampaignRequest(str(arm_file), campaign=_campaign_file(tmp_path, MODEL_ERROR),
                                       out=str(tmp_path / "out"), workers=2))
    summary = run.summary
    failed = [r for r in run.outcome.results.values() if r.verdict != "tracked"]
    assert failed and run.exit_code == 3
    worst = summary["worst"][0]
    case = run.outcome.results[worst["index"]]
    assert case.verdict != "tracked" and worst["verdict"] == case.verdict
    # the printed command, run on its own as a user would
    words = shlex.split(worst["rerun"])
    done = subprocess.run([sys.executable, "-m", "linz_ros", *words[1:], "--json", "--no-plots",
                           "-o", str(tmp_path / "rerun")], capture_output=True, text=True, timeout=300)
    assert done.returncode == 0, done.stderr
    alone = json.loads(done.stdout)
    assert alone["verdict"] == case.verdict and alone["verdict_at"] == case.verdict_at
    assert {k: o["max_error"] for k, o in alone["outputs"].items()} == case.max_error
    assert alone["min_sigma"] == case.min_sigma


def test_the_nominal_arm_over_its_working_region_has_no_failure(arm_file, tmp_path):
    run = run_campaign(CampaignRequest(str(arm_file), campaign=str(CELL), out=str(tmp_path), runs=24, workers=2))
    assert {r.verdict for r in run.outcome.results.values()} == {"tracked"}
    assert len(run.outcome.results) == 24 and not run.outcome.lost and run.exit_code == 0
    assert (tmp_path / "cases.csv").read_text().count("\n") == 25
    assert (tmp_path / "summary.json").is_file() and (tmp_path / "region.png").is_file()


def test_one_worker_and_two_give_identical_results(arm_file, tmp_path):
    text = _campaign_file(tmp_path, MODEL_ERROR)
    one = run_campaign(CampaignRequest(str(arm_file), campaign=text, out=str(tmp_path / "a"), workers=1))
    two = run_campaign(CampaignRequest(str(arm_file), campaign=text, out=str(tmp_path / "b"), workers=2))
    assert one.outcome.results == two.outcome.results
    assert _comparable(one.summary) == _comparable(two.summary)
    assert (tmp_path / "a" / "cases.csv").read_bytes() == (tmp_path / "b" / "cases.csv").read_bytes()


def test_a_worker_killed_mid_campaign_loses_no_case(arm_file, tmp_path, monkeypatch):
    """kill -9 of a busy worker: its case runs again elsewhere; every result equals an undisturbed run."""
    import multiprocessing

    text = _campaign_file(tmp_path, MODEL_ERROR)
    reference = run_campaign(CampaignRequest(str(arm_file), campaign=text, out=str(tmp_path / "ref"), workers=1))
    killed: list[int] = []

    def kill_one_busy_worker() -> None:
        deadline = time.monotonic() + 60
        while time.monotonic() < deadline and not killed:
            children = multiprocessing.active_children()
            if len(children) == 2 and (tmp_path / "go").exists():
                os.kill(children[0].pid, signal.SIGKILL)
                killed.append(children[0].pid)
            time.sleep(0.01)

    class Bar(_QuietBar):           # the progress bar's place: says when two cases are done
        def __call__(self, fraction, detail=""):
            if fraction > 0.1:
                (tmp_path / "go").touch()

    monkeypatch.setattr(campaign_command, "ProgressBar", Bar)
    killer = threading.Thread(target=kill_one_busy_worker)
    killer.start()
    run = run_campaign(CampaignRequest(str(arm_file), campaign=text, out=str(tmp_path / "k"), workers=2))
    killer.join()
    assert killed
    assert not run.outcome.lost and not run.outcome.interrupted
    # the case the killed worker held ran again
    assert sorted(run.outcome.attempts.values()) == [1] * (len(run.outcome.cases) - 1) + [2]
    assert run.outcome.results == reference.outcome.results


def test_ctrl_c_keeps_and_reports_what_finished(arm_file, tmp_path, monkeypatch):
    class Interrupting(_QuietBar):
        def __call__(self, fraction, detail=""):
            if fraction >= 0.25:
                raise KeyboardInterrupt

    monkeypatch.setattr(campaign_command, "ProgressBar", Interrupting)
    run = run_campaign(CampaignRequest(str(arm_file), campaign=_campaign_file(tmp_path, MODEL_ERROR),
                                       out=str(tmp_path), workers=1))
    finished = len(run.outcome.results)
    assert run.outcome.interrupted and 3 <= finished < 12 and run.exit_code == 130
    assert run.summary["interrupted"] is True
    assert "interrupted" in campaign_command.render_campaign_run(run).splitlines()[0].lower() or \
        "incomplete" in campaign_command.render_campaign_run(run).splitlines()[0].lower()
    assert json.loads((tmp_path / "summary.json").read_text())["interrupted"] is True


@pytest.fixture(scope="module")
def cluster():
    distributed = pytest.importorskip("distributed")
    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True, dashboard_address=None,
                                  silence_logs=50) as running:
        yield running


def test_a_dask_cluster_gives_the_same_campaign_as_local_processes(arm_file, tmp_path, cluster):
    text = _campaign_file(tmp_path, MODEL_ERROR)
    local = run_campaign(CampaignRequest(str(arm_file), campaign=text, out=str(tmp_path / "local"), workers=2))
    remote = run_campaign(CampaignRequest(str(arm_file), campaign=text, out=str(tmp_path / "dask"),
                                          scheduler=cluster.scheduler_address))
    assert remote.outcome.executor == f"dask scheduler {cluster.scheduler_address}"
    assert remote.outcome.results == local.outcome.results
    assert _comparable(remote.summary) == _comparable(local.summary)
    assert (tmp_path / "local" / "cases.csv").read_bytes() == (tmp_path / "dask" / "cases.csv").read_bytes()


def test_a_dask_worker_killed_mid_campaign_loses_no_case(arm_file, tmp_path, cluster, monkeypatch):
    from distributed import Client

    text = _campaign_file(tmp_path, MODEL_ERROR)
    reference = run_campaign(CampaignRequest(str(arm_file), campaign=text, out=str(tmp_path / "ref"), workers=2))
    killed: list[tuple[int, tuple]] = []

    with Client(cluster.scheduler_address) as client:
        class Bar(_QuietBar):
            def __call__(self, fraction, detail=""):
                if fraction > 0.1 and not killed:
                    busy = {address: keys for address, keys in client.processing().items() if keys}
                    if busy:       # a worker running a case of this campaign, killed mid-case
                        address, keys = sorted(busy.items())[0]
                        pid = client.run(os.getpid, workers=[address])[address]
                        os.kill(pid, signal.SIGKILL)
                        killed.append((pid, tuple(keys)))

        monkeypatch.setattr(campaign_command, "ProgressBar", Bar)
        run = run_campaign(CampaignRequest(str(arm_file), campaign=text, out=str(tmp_path / "k"),
                                           scheduler=cluster.scheduler_address))
    assert killed and all(str(key).startswith("linz-task-") for key in killed[0][1])
    assert not run.outcome.lost and not run.outcome.interrupted
    assert run.outcome.results == reference.outcome.results


def test_the_command_line_says_mistakes_in_one_line(arm_file, tmp_path):
    bad = _campaign_file(tmp_path, "campaign: {runs: 3, mismatch: {m9: [0, 1]}}\n")
    for argv, message in (
            ([str(arm_file), "--campaign", bad], "campaign.mismatch.m9: not a parameter of pick_arm"),
            ([str(arm_file), "--campaign", str(tmp_path / "none.yaml")], "no such file"),
            ([str(arm_file), "--workers", "0"], "--workers"),
            ([str(arm_file), "--runs", "200000"], "--runs: expected a whole number from 1 to 100,000"),
            ([str(arm_file), "--campaign", _campaign_file(tmp_path, "campaign: {duration: 1.0e+9}")],
             "campaign.duration: 1e+09 s at 500 Hz is more than 10,000,000 control steps"),
            ([str(arm_file), "--campaign", _campaign_file(tmp_path, "campaign: {delay: [0, 1.0e+6]}")],
             "campaign.delay: 1e+06 s is longer than the run (5 s)"),
            ([str(arm_file), "--physics", "foo"], "--physics: expected one of model, mujoco, got 'foo'"),
            ([str(arm_file), "--substeps", "1000000"], "--substeps: expected a whole number from 1 to 1000"),
            ([str(arm_file), "--physics", "mujoco", "--scheduler", "tcp://127.0.0.1:9"],
             "--physics: mujoco reads the arm's URDF beside the recorded plant file"),
            ([str(arm_file), "--scheduler", ""], "--scheduler: expected a value, got an empty one")):
        done = subprocess.run([sys.executable, "-m", "linz_ros", "campaign", *argv, "-o", str(tmp_path / "o")],
                              capture_output=True, text=True, timeout=120)
        assert done.returncode == 2 and done.stderr.count("\n") == 1 and message in done.stderr, done.stderr


def test_a_start_on_the_singular_set_is_held_safe_and_a_run_that_cannot_start_is_refused(arm_file):
    """Straight elbow (q2 = 0): det A = 0 (sin q2 = 0), the singularity watchdog holds from the first step."""
    artifact = load_artifact(arm_file)
    options = SimRequest(str(arm_file), force_initial=True)
    spec = read_campaign({"runs": 1, "initial": {"q2": 0.0}, "duration": 0.5}, artifact, "c")
    result = run_case(artifact, CaseItem(spec, draw_cases(spec)[0], options))
    assert (result.verdict, result.verdict_at) == ("held_safe", 0.0) and result.min_sigma < 1e-12
    spec = read_campaign({"runs": 1, "references": ["sine:tool_x=0.1,period=0"], "duration": 0.5}, artifact, "c")
    result = run_case(artifact, CaseItem(spec, draw_cases(spec)[0], options))
    assert (result.verdict, result.detail) == ("refused", "--reference: period and duration must be positive")


def test_an_unknown_campaign_option_value_is_refused_before_any_run(arm_file, tmp_path):
    with pytest.raises(ConfigError, match="--worst"):
        run_campaign(CampaignRequest(str(arm_file), out=str(tmp_path), worst=-1))
    with pytest.raises(ConfigError, match="noise"):
        run_campaign(CampaignRequest(str(arm_file), campaign=_campaign_file(tmp_path, "campaign: {noise: {q9: 1}}"),
                                     out=str(tmp_path)))


def test_a_plant_file_carries_its_own_campaign_section_and_the_artifact_is_written_beside_the_report(tmp_path):
    plant = tmp_path / "pick_arm.yaml"
    plant.write_text((BUNDLED / "pick_arm.yaml").read_text()
                     + "campaign: {runs: 3, seed: 2, duration: 0.5, initial: {q1: [0.2, 0.6]}}\n")
    run = run_campaign(CampaignRequest(str(plant), out=str(tmp_path / "out"), workers=1))
    assert run.outcome.spec.source == str(plant) and len(run.outcome.cases) == 3
    assert [f.name for f in run.outcome.spec.factors] == ["q1"]
    written = tmp_path / "out" / "pick_arm.artifact.json"
    assert run.outcome.artifact_path == str(written) and written.is_file()
    assert all(f" {written} " in command for command in run.outcome.rerun.values())
    assert run.summary["files"][0] == str(written)


def test_ctrl_c_on_the_process_group_keeps_what_finished_and_leaves_no_worker(arm_file, tmp_path):
    """A real SIGINT to the campaign's process group (what a terminal's Ctrl-C sends), mid-run."""
    import re

    text = _campaign_file(tmp_path, MODEL_ERROR.replace("runs: 12", "runs: 400"))
    out = tmp_path / "out"
    process = subprocess.Popen([sys.executable, "-m", "linz_ros", "campaign", str(arm_file), "--campaign", text,
                                "-o", str(out), "--workers", "2", "--progress"], stdout=subprocess.PIPE,
                               stderr=subprocess.PIPE, text=True, start_new_session=True)
    seen = []

    def read_progress() -> None:
        while True:
            chunk = process.stderr.read(64)
            if not chunk:
                return
            seen.append(chunk)

    reader = threading.Thread(target=read_progress, daemon=True)
    reader.start()
    deadline = time.monotonic() + 240
    while time.monotonic() < deadline:
        done = [int(n) for n in re.findall(r"(\d+)/400 runs", "".join(seen))]
        if done and max(done) >= 4:
            break
        assert process.poll() is None, "".join(seen)
        time.sleep(0.05)
    os.killpg(process.pid, signal.SIGINT)
    process.wait(timeout=120)
    reader.join(10)                  # the reader owns stderr up to its end (communicate() would close it)
    stdout = process.stdout.read()
    assert process.returncode == 130
    first = stdout.splitlines()[0]
    assert first.startswith("!! campaign of pick_arm") and "incomplete: interrupted" in first, stdout[:500]
    summary = json.loads((out / "summary.json").read_text())
    assert summary["interrupted"] is True and 4 <= summary["finished"] < 400
    assert summary["never_run"] == 400 - summary["finished"] - summary["lost"]
    # no worker of the group outlives the campaign (multiprocessing's resource tracker leaves on its own)
    left = subprocess.run(["ps", "-o", "pid=,args=", "-g", str(process.pid)], capture_output=True, text=True).stdout
    deadline = time.monotonic() + 10
    while left.strip() and time.monotonic() < deadline:
        time.sleep(0.2)
        left = subprocess.run(["ps", "-o", "pid=,args=", "-g", str(process.pid)], capture_output=True, text=True).stdout
    assert not left.strip(), left
