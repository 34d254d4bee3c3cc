"""Tests of ``linz logs --fleet``: recordings grouped by their identity, analysed through the
executor one by one, summed per machine and per day; bad logs become problem lines."""

import functools
import json
from pathlib import Path

import pytest

from support import BUNDLED, built_artifact_file
from linz_ros.cli import main
from linz_ros.commands.logs import FleetRequest, fleet_report, read_and_report, LogsRequest
from linz_ros.errors import ConfigError
from linz_ros.executor import DEFAULT_ATTEMPTS, Execution, TaskOutcome
from linz_ros.logs import read_logs, summarise
from linz_ros.logs.fleet import (FleetOptions, analyse_recording, fleet_summary, fleet_text, group_recordings,
                                 read_identity, recording_problem)
from linz_ros.runtime import fieldlog
from linz_ros.runtime.recording_identity import MACHINE_ENV, default_machine

REACH = "smooth:tool_x=0.12,tool_y=0.16,duration=1,at=0.1"      # through the singular set


def _sim(artifact: Path, logs: Path, out: Path, duration: str = "1.2") -> None:
    code = main(["sim", str(artifact), "-o", str(out), "--duration", duration, "--no-plots", "--reference", REACH,
                 "--field-log", str(logs), "--watchdog", "envelope_action=warn"])
    assert code == 0


@pytest.fixture(scope="module")
def fleet(tmp_path_factory):
    """Field logs of two machines: alpha two runs, beta one run rotated into several files;
    one older log without identity and one file that is no log at all."""
    root = tmp_path_factory.mktemp("fleet")
    artifact = built_artifact_file(BUNDLED / "pick_arm.yaml", root)
    logs = root / "logs"
    with pytest.MonkeyPatch.context() as patch:
        patch.setenv(MACHINE_ENV, "alpha")
        _sim(artifact, logs / "alpha", root / "run_a1")
        # a folder of its own: two writers started in the same second would pick the same file name
        _sim(artifact, logs / "alpha" / "second", root / "run_a2", duration="0.8")
        patch.setenv(MACHINE_ENV, "beta")
        patch.setattr(fieldlog, "CHUNK_RECORDS", 100)            # small chunks, so small files rotate
        patch.setattr(fieldlog, "FieldLogSettings", functools.partial(fieldlog.FieldLogSettings, max_bytes=4000))
        _sim(artifact, logs / "beta", root / "run_b")
    with pytest.MonkeyPatch.context() as patch:
        patch.setattr(fieldlog, "IDENTITY_RECORD", "not_the_identity")     # as written before the identity
        _sim(artifact, logs / "old", root / "run_old", duration="0.6")
    (logs / "broken.mcap").write_text("not a log at all")
    return logs


def _per_log(files):
    return summarise(read_logs(files))


def test_rotated_files_share_one_identity_and_the_machine(fleet):
    files = sorted((fleet / "beta").glob("*.mcap"))
    assert len(files) >= 3
    identities = [read_identity(f) for f in files]
    assert {i["recording"] for i in identities} == {identities[0]["recording"]}
    assert len(identities[0]["recording"]) == 32 and {i["machine"] for i in identities} == {"beta"}
    assert sorted(int(i["file_index"]) for i in identities) == list(range(len(files)))
    assert identities[0]["started"].endswith("Z")
    assert read_identity(next((fleet / "old").glob("*.mcap"))) is None
    assert read_identity(fleet / "broken.mcap") is None


def test_recordings_are_grouped_by_identity_and_old_files_stand_alone(fleet):
    recordings = group_recordings([fleet])
    by_machine = {}
    for r in recordings:
        by_machine.setdefault(r.machine, []).append(r)
    assert sorted(by_machine) == ["alpha", "beta", "unknown"]
    assert len(by_machine["alpha"]) == 2 and all(len(r.files) == 1 for r in by_machine["alpha"])
    (beta,) = by_machine["beta"]
    assert len(beta.files) == len(list((fleet / "beta").glob("*.mcap"))) >= 3      # a rotated recording counts once
    assert len(by_machine["unknown"]) == 2 and all(r.recording is None for r in by_machine["unknown"])
    assert len({r.name for r in recordings}) == len(recordings) == 5
    assert all(Path(f).is_absolute() for r in recordings for f in r.files)


@pytest.fixture(scope="module")
def one_worker(fleet, tmp_path_factory):
    out = tmp_path_factory.mktemp("fleet_out1")
    return out, fleet_report(FleetRequest([str(fleet)], str(out), workers=1, plots=False))


def test_fleet_numbers_are_the_sums_of_the_per_log_summaries(fleet, one_worker):
    _, report = one_worker
    summary = report.summary
    rows = {r["name"]: r for r in summary["recordings"]}
    per_log = {name: _per_log(r["files"]) for name, r in rows.items()}
    for name, s in per_log.items():
        assert rows[name]["duration"] == pytest.approx(s["duration"])
        assert rows[name]["under_warn_time"] == pytest.approx(s["near_singular"]["under_warn"]["total_time"])
        assert rows[name]["under_act_time"] == pytest.approx(s["near_singular"]["under_act"]["total_time"])
        assert rows[name]["records"] == s["records"] and rows[name]["min_sigma"] == pytest.approx(s["min_sigma"])
    assert sum(s["near_singular"]["under_act"]["total_time"] for s in per_log.values()) > 0    # not all zeros
    for key in ("by_machine", "by_day"):
        for group_name, group in summary[key].items():
            members = [n for n, r in rows.items() if r[key.removeprefix("by_")] == group_name]
            assert group["recordings"] == len(members)
            assert group["duration"] == pytest.approx(sum(per_log[n]["duration"] for n in members))
            warn = sum(per_log[n]["near_singular"]["under_warn"]["total_time"] for n in members)
            assert group["under_warn_time"] == pytest.approx(warn)
            assert group["under_warn_fraction"] == pytest.approx(warn / group["duration"] if members else 0.0)
    assert summary["by_machine"]["alpha"]["recordings"] == 2 and summary["by_machine"]["beta"]["recordings"] == 1
    assert summary["by_machine"]["beta"]["files"] >= 3
    assert summary["totals"]["duration"] == pytest.approx(sum(s["duration"] for s in per_log.values()))
    # the worst episodes across the fleet are the lowest of all recordings', in order
    worst = summary["totals"]["worst"]
    assert [e["min_sigma"] for e in worst] == sorted(e["min_sigma"] for e in worst)
    assert worst[0]["min_sigma"] == pytest.approx(min(s["min_sigma"] for s in per_log.values()))


def test_a_corrupt_file_is_one_problem_line_and_the_others_are_summarised(one_worker):
    out, report = one_worker
    summary = report.summary
    (problem,) = summary["problems"]
    assert problem["name"] == "broken" and problem["machine"] == "unknown"
    assert "not an MCAP file" in problem["problem"] and "\n" not in problem["problem"]
    assert summary["totals"]["recordings"] == 4 and summary["totals"]["failed"] == 1
    assert summary["complete"] is False and summary["headline"].startswith("1 of 5 recording(s) FAILED")
    assert "NOT analysed:\n  broken (unknown): " in report.text
    assert summary["by_machine"]["unknown"]["failed"] == 1
    rows = (out / "fleet.csv").read_text().splitlines()
    assert len(rows) == 6 and any(r.startswith("broken,failed,unknown") for r in rows)
    assert "Not analysed" in (out / "fleet.html").read_text()


def test_each_recording_gets_the_reports_of_linz_logs(fleet, one_worker):
    out, report = one_worker
    beta = next(r for r in report.summary["recordings"] if r["machine"] == "beta")
    folder = out / beta["name"]
    assert sorted(p.name for p in folder.iterdir()) == ["records.csv", "report.html", "summary.json", "summary.txt"]
    alone = read_and_report(LogsRequest([str(fleet / "beta")])).summary
    written = json.loads((folder / "summary.json").read_text())
    for key in ("records", "duration", "near_singular", "verdict", "min_sigma", "time_in_mode"):
        assert written[key] == alone[key]
    assert len((folder / "records.csv").read_text().splitlines()) == alone["records"] + 1
    assert json.loads((out / "fleet.json").read_text())["totals"] == report.summary["totals"]
    assert f"{beta['name']}/report.html" in (out / "fleet.html").read_text()


def test_one_and_two_workers_give_the_same_fleet_summary(fleet, one_worker, tmp_path):
    _, report = one_worker
    two = fleet_report(FleetRequest([str(fleet)], str(tmp_path / "out"), workers=2, plots=False))
    assert two.summary["execution"]["workers"] == 2
    strip = lambda s: {k: v for k, v in s.items() if k != "execution"}     # noqa: E731
    assert json.dumps(strip(two.summary), sort_keys=True) == json.dumps(strip(report.summary), sort_keys=True)


def test_analysing_one_recording_draws_its_plots(fleet):
    (beta,) = [r for r in group_recordings([fleet / "beta"])]
    digest = analyse_recording(FleetOptions(plots=True, csv=False), beta)
    assert {"plots/conditioning.png", "report.html", "summary.json"} <= set(digest.reports)
    images = [k for k in digest.reports if k.endswith(".png")]
    assert digest.reports["report.html"].count(b"data:image/png") == len(images) >= 5
    assert digest.machine == "beta" and digest.plant == "pick_arm" and len(digest.day) == 10


def test_an_interrupted_or_lost_run_says_so_in_the_headline(fleet):
    from linz_ros.commands.logs import _fleet_outcomes

    recordings = group_recordings([fleet / "alpha"])
    execution = Execution({0: TaskOutcome(0, lost="its worker process died on each of 3 attempt(s)")}, True)
    digests, problems, not_run = _fleet_outcomes(recordings, execution)
    summary = fleet_summary(digests, problems, not_run)
    assert [p["name"] for p in not_run] == [recordings[1].name] and not_run[0]["machine"] == "alpha"
    assert problems[0]["problem"].startswith("lost: its worker process died")
    assert summary["headline"].startswith("nothing analysed; 1 of 2 recording(s) FAILED; INTERRUPTED: 1 recording(s) "
                                          "not run; fleet: 0 of 2 recording(s) analysed")
    text = fleet_text(summary)
    assert "NOT analysed" in text and f"NOT run (interrupted):\n  {recordings[1].name} (alpha): 1 file(s)" in text
    assert recording_problem(recordings[0], "one\ntwo")["problem"] == "one"


def test_the_cli_fleet_mode_writes_its_files_and_prints_json(capsys, fleet, tmp_path):
    code = main(["logs", str(fleet / "alpha"), str(fleet / "old"), "--fleet", str(tmp_path / "f"), "--workers", "1",
                 "--no-plots", "--no-csv", "--json"])
    out, err = capsys.readouterr()
    summary = json.loads(out)
    assert summary["complete"] is True and summary["totals"]["recordings"] == 3
    assert code == 3 and summary["totals"]["not_tracked"], err           # every run read, but not all tracked
    assert summary["execution"]["where"] == "1 local process"
    assert {p.name for p in (tmp_path / "f").iterdir()} >= {"fleet.json", "fleet.csv", "fleet.html"}
    assert not list((tmp_path / "f").rglob("records.csv"))


@pytest.mark.parametrize("argv, option", [
    (["--workers", "2"], "--workers"),
    (["--scheduler", "tcp://127.0.0.1:1"], "--scheduler"),
    (["--no-plots"], "--no-plots"),
    (["--attempts", "5"], "--attempts"),
    (["--attempts", str(DEFAULT_ATTEMPTS)], "--attempts"),                 # even the default, given
    (["--fleet", "OUT", "--csv", "x.csv"], "--csv"),
    (["--fleet", ""], "--fleet"),
])
def test_the_cli_refuses_options_of_the_other_mode_with_one_line(capsys, fleet, tmp_path, argv, option):
    argv = [a.replace("OUT", str(tmp_path / "o")) for a in argv]
    code = main(["logs", str(fleet / "old"), *argv])
    _, err = capsys.readouterr()
    assert code == 2 and option in err and len(err.strip().splitlines()) == 1


def test_the_machine_name_comes_from_the_environment_or_the_settings(monkeypatch, tmp_path):
    monkeypatch.setenv(MACHINE_ENV, "robot-7")
    assert default_machine() == "robot-7" and fieldlog.FieldLogSettings(tmp_path).machine == "robot-7"
    assert fieldlog.FieldLogSettings(tmp_path, machine="cell 3").machine == "cell 3"
    monkeypatch.delenv(MACHINE_ENV)
    assert default_machine() and default_machine().isprintable()
    with pytest.raises(ConfigError, match="field_log_machine: 'a\\\\x00b': expected a printable machine name"):
        fieldlog.FieldLogSettings(tmp_path, machine="a\x00b")
    monkeypatch.setenv(MACHINE_ENV, "x" * 65)
    with pytest.raises(ConfigError, match="LINZ_MACHINE: .* of 1 to 64 characters"):
        default_machine()


def test_the_controller_parameter_names_the_machine(tmp_path):
    from linz_ros.runtime.controller_settings import controller_parameters, field_log_settings

    values = {spec.name: spec.default for spec in controller_parameters(("s",), ("c",), ("e",))}
    values["field_log_folder"] = str(tmp_path)
    assert field_log_settings({**values, "field_log_machine": "arm-2"}, "node").machine == "arm-2"
    assert field_log_settings(values, "node").machine == default_machine()


# ----------------------------------------------------------------------------- review fixes

def _rewrite(source: Path, target: Path, old: bytes, new: bytes) -> Path:
    """A copy of a log with a metadata value replaced by one of the same length (the framing stays valid)."""
    assert len(old) == len(new)
    data = source.read_bytes()
    assert old in data
    target.parent.mkdir(parents=True, exist_ok=True)
    target.write_bytes(data.replace(old, new))
    return target


def _alpha_files(fleet):
    return sorted((fleet / "alpha").rglob("*.mcap"))


def test_the_fleet_folder_is_checked_before_any_recording_is_analysed(fleet, tmp_path, monkeypatch):
    import linz_ros.executor as executor

    monkeypatch.setattr(executor, "run_tasks", lambda *a, **k: pytest.fail("analysed before the folder was checked"))
    (tmp_path / "file").write_text("x")
    with pytest.raises(ConfigError, match="--fleet: cannot write .*file"):
        fleet_report(FleetRequest([str(fleet / "alpha")], str(tmp_path / "file" / "sub"), workers=1))


def test_each_recordings_reports_are_written_as_it_arrives_and_not_kept(fleet, tmp_path, monkeypatch):
    import linz_ros.executor as executor

    real, seen = executor.run_tasks, []

    def watching(*args, keep=None, **kwargs):
        def kept(outcome):
            digest = keep(outcome)
            seen.append((digest.reports, (tmp_path / "o" / digest.name / "summary.json").is_file(),
                         (tmp_path / "o" / "fleet.json").is_file()))
            return digest
        return real(*args, keep=kept, **kwargs)

    monkeypatch.setattr(executor, "run_tasks", watching)
    report = fleet_report(FleetRequest([str(fleet / "alpha")], str(tmp_path / "o"), workers=1, plots=False))
    assert seen == [({}, True, True)] * 2
    assert all(r["reports"] == ["records.csv", "report.html", "summary.json", "summary.txt"]
               for r in report.summary["recordings"])


def test_a_copied_log_is_read_once_and_a_differing_copy_is_a_conflict(fleet, tmp_path):
    first = _alpha_files(fleet)[0]
    copy = tmp_path / "copy" / first.name
    copy.parent.mkdir()
    copy.write_bytes(first.read_bytes())
    recordings = group_recordings([fleet / "alpha", tmp_path / "copy"])
    assert len(recordings) == 2 and sum(len(r.files) for r in recordings) == 2
    (found,) = [p for r in recordings for p in r.problems]
    assert f"{copy}: an identical copy of {first} (file_index 0): read once" == found
    copy.write_bytes(first.read_bytes()[:-100])                # cut short: differs
    recordings = group_recordings([fleet / "alpha", tmp_path / "copy"])
    assert sum(len(r.files) for r in recordings) == 2
    (found,) = [p for r in recordings for p in r.problems]
    assert found.startswith("conflicting copies of file_index 0: ") and str(first) in found and str(copy) in found


def test_one_recording_id_on_two_machines_is_two_recordings_with_a_problem(fleet, tmp_path):
    first = _alpha_files(fleet)[0]
    _rewrite(first, tmp_path / "gamma" / first.name, b"alpha", b"gamma")
    for order in ([fleet / "alpha", tmp_path / "gamma"], [tmp_path / "gamma", fleet / "alpha"]):
        recordings = group_recordings(order)
        assert sorted(r.machine for r in recordings) == ["alpha", "alpha", "gamma"]
        twins = [r for r in recordings if r.recording == read_identity(first)["recording"]]
        assert sorted(r.machine for r in twins) == ["alpha", "gamma"]
        assert any("also on machine(s) gamma" in p for p in twins[0].problems + twins[1].problems)


def test_files_of_one_recording_that_disagree_on_the_start_or_miss_an_index_are_problems(fleet, tmp_path):
    import shutil

    beta = tmp_path / "beta"
    shutil.copytree(fleet / "beta", beta)
    files = sorted(beta.glob("*.mcap"))
    started = read_identity(files[0])["started"].encode()
    _rewrite(files[2], files[2], started, started.replace(b"Z", b"Z")[:-3] + b"59Z")
    files[1].unlink()
    (recording,) = group_recordings([beta])
    assert "file_index 1 of this recording is missing (not among the files read)" in recording.problems
    assert any(p.startswith("its files disagree on the start (") for p in recording.problems)


def test_an_unreadable_identity_is_a_gap_and_unknown_is_no_machine_or_day(fleet, tmp_path, one_worker):
    import shutil

    beta = tmp_path / "beta"
    shutil.copytree(fleet / "beta", beta)
    files = sorted(beta.glob("*.mcap"))
    files[1].write_bytes(b"\x89MCAP0\r\n" + b"\x00" * 64)      # its identity cannot be read
    recordings = group_recordings([beta])
    real = next(r for r in recordings if r.machine == "beta")
    assert "file_index 1 of this recording is missing (not among the files read)" in real.problems
    _, report = one_worker
    assert "unknown" in report.summary["by_machine"]
    assert {"unknown"} < set(report.summary["by_day"]) and len(report.summary["by_machine"]) == 3
    assert " file(s), 2 machine(s), 1 day(s))" in report.summary["headline"]


def test_a_recording_across_midnight_is_split_per_utc_day(fleet, monkeypatch):
    import numpy as np

    import linz_ros.logs.fleet as fleet_module

    (recording,) = [r for r in group_recordings([fleet / "alpha"]) if r.files[0] == str(_alpha_files(fleet)[0])]
    log = read_logs(recording.files)
    midnight = 20_000 * 86400.0
    shifted = midnight - 0.5 + (log.log_time - log.log_time[0])          # half a second before midnight
    log.log_time = shifted
    monkeypatch.setattr(fleet_module, "read_logs", lambda files: log)
    digest = analyse_recording(FleetOptions(plots=False, csv=False), recording)
    first, second = "2024-10-03", "2024-10-04"                          # 20 000 days after 1970-01-01
    assert sorted(digest.days) == [first, second]
    days = digest.days.values()
    assert sum(d["duration"] for d in days) == pytest.approx(digest.duration)
    assert sum(d["under_warn_time"] for d in days) == pytest.approx(digest.under_warn_time)
    assert sum(d["under_act_time"] for d in days) == pytest.approx(digest.under_act_time)
    assert sum(d["under_warn_count"] for d in days) == digest.under_warn_count
    assert sum(d["records"] for d in days) == digest.records == len(log)
    before = int(np.sum(shifted < midnight))
    assert digest.days[first]["records"] == before > 0
    assert all(e["day"] == e["utc"][:10] for e in digest.worst)
    assert digest.day == recording.started[:10]                 # the rule of failed recordings too
    summary = fleet_summary([digest], [])
    assert sorted(summary["by_day"]) == [first, second]
    assert summary["by_day"][second]["worst"] == digest.days[second]["worst"] != []
    assert all(e["day"] == second for e in summary["by_day"][second]["worst"])


def test_a_failed_fleet_exits_3_and_says_so_first(capsys, fleet, tmp_path):
    (tmp_path / "bad").mkdir()
    (tmp_path / "bad" / "x.mcap").write_text("not a log")
    code = main(["logs", str(tmp_path / "bad"), "--fleet", str(tmp_path / "o1"), "--workers", "1"])
    out, _ = capsys.readouterr()
    assert code == 3 and out.startswith("nothing analysed; 1 of 1 recording(s) FAILED; fleet: 0 of 1")
    code = main(["logs", str(fleet / "alpha"), str(tmp_path / "bad"), "--fleet", str(tmp_path / "o2"), "--workers",
                 "1", "--no-plots", "--no-csv"])
    out, _ = capsys.readouterr()
    assert code == 3 and out.startswith("1 of 3 recording(s) FAILED; 2 recordings left their envelope; fleet: 2 of 3")
    assert out.splitlines()[-1].startswith("ran on 1 local process; wrote ")


def test_an_attached_artifact_is_never_overridden_by_the_option(fleet, tmp_path):
    other = built_artifact_file(BUNDLED / "mast_camera.yaml", tmp_path)
    summary = read_and_report(LogsRequest([str(_alpha_files(fleet)[0])], artifact=str(other))).summary
    assert any(p.endswith("is for plant mast_camera, the log's attached artifact for pick_arm: --artifact not used")
               for p in summary["problems"])
    assert summary["thresholds"] == read_and_report(LogsRequest([str(_alpha_files(fleet)[0])])).summary["thresholds"]


def test_entries_that_are_no_regular_files_are_listed_as_problems(fleet, tmp_path):
    import os

    folder = tmp_path / "logs"
    folder.mkdir()
    (folder / "run.mcap").write_bytes(_alpha_files(fleet)[1].read_bytes())
    (folder / "gone.mcap").symlink_to(tmp_path / "nowhere.mcap")
    os.mkfifo(folder / "pipe.mcap")
    report = fleet_report(FleetRequest([str(folder)], str(tmp_path / "o"), workers=1, plots=False, csv=False))
    problems = {p["name"]: p["problem"] for p in report.summary["problems"]}
    assert problems == {"gone.mcap": f"{folder / 'gone.mcap'}: a broken symbolic link, not a regular file: not read",
                        "pipe.mcap": f"{folder / 'pipe.mcap'}: a named pipe (FIFO), not a regular file: not read"}
    assert report.summary["totals"]["recordings"] == 1 and report.exit_code == 3


def test_recordings_not_run_are_named_in_csv_and_html(fleet, tmp_path):
    from linz_ros.commands.logs import _fleet_outcomes
    from linz_ros.logs.fleet_report import write_fleet_csv, write_fleet_html

    recordings = group_recordings([fleet / "alpha"])
    summary = fleet_summary(*_fleet_outcomes(recordings, Execution({}, True)))
    assert [p["name"] for p in summary["not_run"]] == sorted(r.name for r in recordings)
    rows = write_fleet_csv(summary, tmp_path / "f.csv").read_text().splitlines()[1:]
    assert sorted(r.split(",")[:3] for r in rows) == sorted([r.name, "not_run", "alpha"] for r in recordings)
    page = write_fleet_html(summary, tmp_path / "f.html").read_text()
    assert "NOT run (interrupted)" in page and all(r.name in page for r in recordings)


def test_a_fleet_folder_is_reused_cleanly_and_other_folders_are_refused(capsys, fleet, tmp_path):
    from linz_ros.logs.fleet_report import prepare_fleet_folder

    other = tmp_path / "other"
    other.mkdir()
    (other / "mine.txt").write_text("keep")
    code = main(["logs", str(fleet / "old"), "--fleet", str(other), "--workers", "1"])
    _, err = capsys.readouterr()
    assert code == 2 and "not empty and holds no fleet.json" in err and len(err.strip().splitlines()) == 1
    assert [p.name for p in other.iterdir()] == ["mine.txt"]
    old = tmp_path / "fleet"
    (old / "stale_recording").mkdir(parents=True)
    (old / "stale_recording" / "records.csv").write_text("old")
    (old / "notes.txt").write_text("kept")
    (old / "fleet.json").write_text(json.dumps({"recordings": [{"name": "stale_recording"}],
                                                "problems": [{"name": ".."}]}))
    prepare_fleet_folder(old, ["new_one"])
    assert sorted(p.name for p in old.iterdir()) == ["fleet.json", "notes.txt"]
    assert json.loads((old / "fleet.json").read_text())["planned"] == ["new_one"]


def test_identity_fields_are_checked_and_never_reach_the_terminal_raw(fleet, tmp_path):
    from linz_ros.commands._common import terminal_safe
    from linz_ros.runtime.recording_identity import checked_identity

    first = _alpha_files(fleet)[0]
    forged = _rewrite(first, tmp_path / "x" / first.name, b"alpha", b"\x1b[31m")
    (recording,) = group_recordings([forged])
    assert recording.machine == "unknown"
    assert any("identity: machine '\\x1b[31m' is not a printable name" in p for p in recording.problems)
    identity, problems = checked_identity({"recording": "ab\ncd", "machine": "m"})
    assert identity is None and problems == ["identity: recording id 'ab\\ncd' is malformed: the file is read on "
                                             "its own"]
    identity, problems = checked_identity({"recording": "abc", "machine": "m", "started": "2024-13-01T00:00:00Z",
                                           "file_index": "-1"})
    assert identity == {"recording": "abc", "machine": "m"} and len(problems) == 2
    digest = analyse_recording(FleetOptions(plots=False, csv=False), recording)
    digest.problems.append("a\x1b[2Jb\nforged line")
    text = fleet_text(fleet_summary([digest], []), safe=terminal_safe)
    assert "\x1b" not in text and "\nforged line" not in text


def test_groups_and_recordings_name_their_worst_episode(one_worker):
    out, report = one_worker
    lines = report.text.splitlines()
    groups = len(report.summary["by_machine"]) + len(report.summary["by_day"])
    assert sum(line.startswith("    worst: ") for line in lines) == groups
    alpha = next(line for line in lines if line.startswith("  alpha: "))
    assert lines[lines.index(alpha) + 1].startswith("    worst: alpha_")
    assert all(", worst min sigma " in line for line in lines if line.startswith("  alpha_"))
    page = (out / "fleet.html").read_text()
    assert page.count("<th>worst episode</th>") == 4


def test_fleet_options_are_checked_and_durations_read_well(capsys, fleet, tmp_path):
    from linz_ros.logs.fleet_report import duration_text

    code = main(["logs", str(fleet / "old"), "--fleet", str(tmp_path / "o"), "--artifact", ""])
    _, err = capsys.readouterr()
    assert code == 2 and err.strip() == "linz: --artifact: expected a file name, got an empty one"
    assert [duration_text(s) for s in (0.0, 1.234, 125.0, 360000.0, 3599.6)] == \
        ["0 s", "1.23 s", "2 min 5 s", "100 h 0 min", "1 h 0 min"]


def _fleet_exit(problems=(), not_tracked=None, interrupted=False) -> int:
    from linz_ros.commands.logs import FleetReport

    summary = {"problems": list(problems), "totals": {"not_tracked": not_tracked or {}}}
    return FleetReport(summary, "", interrupted=interrupted).exit_code


def test_the_fleet_exits_0_only_when_every_recording_was_read_and_tracked():
    assert _fleet_exit() == 0
    assert _fleet_exit(not_tracked={"diverged": 1}) == 3
    assert _fleet_exit(problems=[{"name": "lost one"}]) == 3
    assert _fleet_exit(problems=[{"name": "lost one"}], interrupted=True) == 130


def test_ctrl_c_while_the_tables_are_written_keeps_fleet_json_and_prints_the_summary(capsys, fleet, tmp_path,
                                                                                     monkeypatch):
    import linz_ros.logs.fleet_report as fleet_report_module

    def interrupted(summary, path):
        Path(path).write_text("half a page")
        raise KeyboardInterrupt

    monkeypatch.setattr(fleet_report_module, "write_fleet_html", interrupted)
    out_folder = tmp_path / "f"
    code = main(["logs", str(fleet / "alpha"), "--fleet", str(out_folder), "--workers", "1", "--no-plots", "--no-csv"])
    out, _ = capsys.readouterr()
    assert code == 130
    summary = json.loads((out_folder / "fleet.json").read_text())
    assert summary["totals"]["recordings"] == 2 and out.startswith(summary["headline"])
    assert "INTERRUPTED while writing the fleet's tables: fleet.json is whole" in out
    assert (out_folder / "fleet.csv").is_file() and not (out_folder / "fleet.html").exists()


def test_per_day_durations_sum_to_the_summary_duration_across_bad_and_backward_times(fleet, monkeypatch):
    import numpy as np

    import linz_ros.logs.fleet as fleet_module
    from linz_ros.logs.analysis import record_durations

    (recording,) = [r for r in group_recordings([fleet / "alpha"]) if r.files[0] == str(_alpha_files(fleet)[0])]
    log = read_logs(recording.files)
    t = log.values[:, log.labels.index("t")]
    t[40] = np.nan                                          # a refused bad stamp
    t[80:] -= 0.5                                           # a step back in time (a writer restarted)
    log.log_time = 20_000 * 86400.0 - 0.1 + (log.log_time - log.log_time[0])     # across a UTC midnight
    monkeypatch.setattr(fleet_module, "read_logs", lambda files: log)
    digest = analyse_recording(FleetOptions(plots=False, csv=False), recording)
    assert len(digest.days) == 2
    assert sum(d["duration"] for d in digest.days.values()) == pytest.approx(digest.duration)
    assert digest.duration == pytest.approx(summarise(log)["duration"])
    steps = record_durations(t)
    assert np.all(np.isfinite(steps)) and np.all(steps >= 0) and steps[79] == 0.0
    assert digest.duration == pytest.approx(t[-1] - t[0] + 0.5)      # the step back counts zero, the last one period
