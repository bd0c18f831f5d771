"""`leeward serve` with `executor = "slurm"` on a real Slurm cluster.

tests/slurm/cluster.sh starts a single-node Slurm 22.05 cluster on this
machine (munged, slurmctld and slurmd under a directory of the test's own,
Debian's slurm-wlm and munge installed with apt-get when missing); every job
here is a real batch job that runs `leeward process --job DIR`. Where the
cluster cannot start (no root, no packages, no loopback), the tests skip
with the reason the script printed, never silently.

What is checked, with the reference beside each check:
- every step is published exactly once (the ledger) and ran under Slurm
  (`sacct -c`, which reads the cluster's job-completion file);
- the products are identical, variable by variable and bit for bit, to those
  of the local executor (a second service on the same delivery);
- `scontrol requeue` and `scancel` of a running job: still published once,
  the cancelled run recorded with Slurm's own state and its log kept;
- a step whose every run fails: reported failed (kind `job`) with Slurm's
  state and the kept log, nothing published;
- kill -9 of the coordinator while a job runs: after the restart the job is
  followed again, nothing is submitted twice and nothing lost;
- a scheduler that cannot be reached: steps run on the coordinator's own
  workers, and /health and /metrics say so.
"""

from __future__ import annotations

import hashlib
import json
import os
import shutil
import subprocess
import tempfile
import time
from pathlib import Path

import pytest

from conftest import REPO_ROOT, leeward_bin_path
from test_service import (
    Reader,
    Service,
    assert_same_products,
    data_variables,
    deliver_renamed,
    demo_inputs,
    step_key,
    wait_for,
)

CLUSTER = REPO_ROOT / "tests" / "slurm" / "cluster.sh"
DEADLINE_S = 180


@pytest.fixture(scope="module")
def slurm():
    """A running single-node cluster: the environment to reach it."""
    # munge and slurmstepd put Unix sockets under the directory: keep it short.
    d = Path(tempfile.mkdtemp(prefix="lws", dir="/tmp"))
    r = subprocess.run(["bash", str(CLUSTER), "start", str(d)],
                       capture_output=True, text=True, timeout=600)
    if r.returncode != 0:
        subprocess.run(["bash", str(CLUSTER), "stop", str(d)], capture_output=True, timeout=120)
        tail = "\n".join(r.stderr.strip().splitlines()[-6:])
        pytest.skip(f"no Slurm cluster could be started here (cluster.sh exit {r.returncode}): {tail}")
    line = [x for x in r.stdout.splitlines() if x.startswith("SLURM_CONF=")][-1]
    env = {"SLURM_CONF": line.split("=", 1)[1]}
    yield env
    subprocess.run(["bash", str(CLUSTER), "stop", str(d)], capture_output=True, timeout=120)
    shutil.rmtree(d, ignore_errors=True)


def slurm_cmd(env: dict, *args: str) -> str:
    r = subprocess.run(list(args), capture_output=True, text=True, timeout=60,
                       env=dict(os.environ, **env))
    assert r.returncode == 0, (args, r.stdout, r.stderr)
    return r.stdout


def sacct(env: dict, job: str) -> list[list[str]]:
    """Job records from the completion file: one per run of the job."""
    out = slurm_cmd(env, "sacct", "-c", "-j", job, "-P", "-n",
                    "-o", "JobID,JobName,State,ExitCode")
    return [line.split("|") for line in out.splitlines() if line.strip()]


def squeue(env: dict, states: str = "") -> dict[str, tuple[str, str]]:
    """Jobs the controller holds: id -> (state, name); with states="all", ended
    ones too (cluster.sh keeps them MinJobAge = 3600 s)."""
    out = slurm_cmd(env, "squeue", "-h", "-o", "%i|%T|%j", *(["-t", states] if states else []))
    rows = [line.split("|") for line in out.splitlines() if line.strip()]
    return {r[0]: (r[1], r[2]) for r in rows}


def slurm_service(root: Path, env: dict, slurm_extra: str = "", feed_extra: str = "",
                  grace: float = 2.0) -> Service:
    return Service(root, env=env,
                   extra_service=f"""
[service.slurm]
memory = "1000M"
cpus_per_step = 1
poll_s = 0.3
time_limit = "00:10:00"
result_grace_s = {grace}
{slurm_extra}
""",
                   extra=f'executor = "slurm"\n{feed_extra}')


def records(svc: Service, event: str) -> list[dict]:
    return [r for r in svc.ledger() if r["event"] == event]


def no_stray_files(root: Path):
    """Nothing hidden left in the output tree and no staging directory (the
    feed's `.jobs` and `.publish` directories hold them while in use)."""
    out = root / "out"
    work = (".jobs", ".publish")
    stray = [p for p in out.rglob("*") if p.name.startswith(".") and p.name not in work]
    left = [x for w in work if (out / "demo" / w).exists() for x in (out / "demo" / w).iterdir()]
    assert stray == [] and left == [], (stray, left)


def test_steps_run_as_slurm_jobs_are_published_once_and_identical_to_local(tmp_path, slurm):
    leads = [0, 6, 12, 18]
    files = demo_inputs(tmp_path / "gen", "2026031400", leads)
    # +18 h before +12 h: the later step's changes are completed from the
    # earlier one's job, through a staged copy the coordinator renames.
    order = [files[0], files[1], files[3], files[2]]

    def feed(svc: Service):
        for f in order:
            deliver_renamed(f.read_bytes(), svc.root / "in" / f.name)
            time.sleep(0.3)
        wait_for(lambda: len(svc.published()) == 4, DEADLINE_S, "four steps published")

    local = Service(tmp_path / "local").start()
    feed(local)
    assert local.stop() == 0

    svc = slurm_service(tmp_path / "batch", slurm).start()
    reader = Reader(tmp_path / "batch" / "out")
    reader.start()
    try:
        feed(svc)
        time.sleep(0.5)
    finally:
        reader.stop_flag = True
        reader.join(timeout=10)
    assert reader.failures == [], reader.failures[:5]

    pubs = svc.published()
    assert sorted(r["step"]["lead"] for r in pubs) == leads, "each step published once"
    subs = records(svc, "submitted")
    assert sorted(r["step"]["lead"] for r in subs) == leads, "one job per step"
    for r in subs:
        name = f"lw_demo_20260314T0000Z_{r['step']['lead']:03d}h"
        runs = sacct(slurm, r["job"])
        assert runs and runs[-1][1] == name and runs[-1][2] == "COMPLETED", runs
    # Each manifest is the service's, written after the job's result was taken.
    for r in pubs:
        m = json.loads(Path(r["manifest"]).read_text())
        assert m["state"] == "complete" and m["lead_hours"] == r["step"]["lead"]
        # The SHA-256 the job computed on its node, as Python's hashlib (FIPS 180-4)
        # computes it from the published file (later files revised after additions).
        product = Path(r["manifest"]).parent / m["product"]
        assert m["product_bytes"] == product.stat().st_size
        assert m["product_checksum"] == hashlib.sha256(product.read_bytes()).hexdigest()
    assert_same_products(svc.out_files(),
                         {p.name: p for p in local.out_files() if p.suffix == ".nc"})
    # The +12 h step came last: the +18 h file had its 6-hour thickness change
    # added afterwards, exactly as the local executor adds it.
    late = [p for p in svc.out_files() if p.name.endswith("_018h.nc")][0]
    assert "thick_chg_06h_1000_500" in data_variables(late)
    no_stray_files(tmp_path / "batch")
    assert svc.metric("leeward_scheduler_up") == 1
    assert svc.metric("leeward_scheduler_jobs_submitted_total") == 4
    assert svc.stop() == 0


def wait_running(env: dict, name: str, timeout: float) -> str:
    found = {}

    def running():
        for job, (state, jname) in squeue(env).items():
            if jname == name and state == "RUNNING":
                found["job"] = job
                return True
        return False

    wait_for(running, timeout, f"job {name} running")
    return found["job"]


def test_a_requeued_and_a_cancelled_job_still_publish_each_step_once(tmp_path, slurm):
    leads = [0, 6]
    files = demo_inputs(tmp_path / "gen", "2026031400", leads)
    # A pause before leeward in the job script keeps each job running long
    # enough to be requeued or cancelled by hand.
    svc = slurm_service(tmp_path, slurm, slurm_extra='setup = ["sleep 4"]').start()
    deliver_renamed(files[0].read_bytes(), tmp_path / "in" / files[0].name)
    job0 = wait_running(slurm, "lw_demo_20260314T0000Z_000h", 60)
    slurm_cmd(slurm, "scontrol", "requeue", job0)
    deliver_renamed(files[1].read_bytes(), tmp_path / "in" / files[1].name)
    wait_for(lambda: len(svc.published()) == 1, DEADLINE_S, "the requeued step published")
    job6 = wait_running(slurm, "lw_demo_20260314T0000Z_006h", 60)
    slurm_cmd(slurm, "scancel", job6)
    wait_for(lambda: len(svc.published()) == 2, DEADLINE_S, "the cancelled step published")

    pubs = svc.published()
    assert sorted(r["step"]["lead"] for r in pubs) == leads, "each step published once"
    # The requeued job ran twice under one id, and its result was taken once.
    shown = slurm_cmd(slurm, "scontrol", "show", "job", job0)
    assert "Restarts=1" in shown, shown
    subs = records(svc, "submitted")
    assert [r["job"] for r in subs if r["step"]["lead"] == 0] == [job0]
    # The cancelled job: recorded with Slurm's own state, its log kept, and
    # the step submitted again as attempt 2.
    ended = records(svc, "job_ended")
    assert [(e["job"], e["state"]) for e in ended] == [(job6, "CANCELLED")], ended
    assert ended[0]["log"] and Path(ended[0]["log"]).exists()
    assert [r["attempt"] for r in subs if r["step"]["lead"] == 6] == [1, 2]
    assert any(run[2].startswith("CANCELLED") for run in sacct(slurm, job6))
    assert svc.metric("leeward_scheduler_job_retries_total") == 1
    assert svc.metric("leeward_scheduler_jobs_ended_total", state="CANCELLED") == 1
    no_stray_files(tmp_path)
    assert svc.stop() == 0


def test_a_step_whose_jobs_all_fail_is_reported_with_slurms_reason_and_the_log(tmp_path, slurm):
    files = demo_inputs(tmp_path / "gen", "2026031400", [0])
    # The job ignores SIGTERM, so that after scancel Slurm holds it in
    # COMPLETING until KillWait (20 s in cluster.sh) has passed and it is
    # killed: a job still going, not yet ended (squeue(1), JOB STATE CODES).
    svc = slurm_service(tmp_path, slurm, slurm_extra=(
        'max_attempts = 1\nsetup = ["trap \'\' TERM", "echo job-started", "sleep 30"]')).start()
    deliver_renamed(files[0].read_bytes(), tmp_path / "in" / files[0].name)
    job = wait_running(slurm, "lw_demo_20260314T0000Z_000h", 60)
    # RUNNING says Slurm started the batch script, not that the script has
    # reached its trap yet: cancelled before it, the job ends at the SIGTERM
    # and is COMPLETING only for a moment. The line the job echoes after the
    # trap says it is in place.
    def job_trapped_term() -> bool:
        for log in (tmp_path / "out" / "demo" / ".jobs").glob("*/job.log"):
            try:
                if "job-started" in log.read_text(errors="replace"):
                    return True
            except OSError:  # gone between the listing and the read: look again
                pass
        return False

    wait_for(job_trapped_term, 60, f"job {job} past its trap of SIGTERM")
    slurm_cmd(slurm, "scancel", job)
    wait_for(lambda: squeue(slurm).get(job, ("",))[0] == "COMPLETING", 30,
             f"Slurm shows job {job} COMPLETING")
    # The test must have watched the service while Slurm said COMPLETING for
    # longer than result_grace_s (2 s) plus several of its looks (poll_s 0.3 s):
    # a service that took COMPLETING for an end would have failed the step
    # after the grace, within the span watched. A loaded machine slows the
    # test's own squeue calls, so the span seen counts, not the calls made.
    first_seen = last_seen = time.monotonic()
    while squeue(slurm).get(job, ("",))[0] == "COMPLETING":
        assert records(svc, "job_ended") == [] and records(svc, "failed") == [], \
            "a COMPLETING job was taken for ended"
        last_seen = time.monotonic()
        time.sleep(0.2)
    assert last_seen - first_seen >= 2.0 + 1.5, \
        f"COMPLETING seen for {last_seen - first_seen:.2f} s, under result_grace_s and five of the service's looks"
    wait_for(lambda: records(svc, "failed"), 60, "the step reported failed")
    failed = records(svc, "failed")
    assert len(failed) == 1 and failed[0]["kind"] == "job", failed
    reason = failed[0]["reason"]
    assert f"Slurm job {job} ended CANCELLED" in reason and "1 of 1 attempts used" in reason, reason
    log = Path(reason.split("log ", 1)[1])
    assert log.parent == tmp_path / "state" / "job-logs" and "job-started" in log.read_text()
    assert svc.published() == [] and not any(p.suffix == ".nc" for p in svc.out_files())
    st = subprocess.run([str(leeward_bin_path()), "status", "--state-dir", str(tmp_path / "state")],
                        capture_output=True, text=True, timeout=30)
    assert "+0h failed (batch job (attempts used up))" in st.stdout, st.stdout
    no_stray_files(tmp_path)
    assert svc.stop() == 0


def test_a_result_seen_only_after_its_job_ended_is_still_taken(tmp_path, slurm):
    """On a shared file system the result record a node wrote may show on the
    service's host after Slurm already says COMPLETED. Here the job hides its
    record as it ends and the test puts it back once the job is COMPLETED:
    within service.slurm.result_grace_s the run is not failed, and the step
    is published once from that very job."""
    files = demo_inputs(tmp_path / "gen", "2026031400", [0])
    wrapper = tmp_path / "late-result.sh"
    wrapper.write_text(
        "#!/bin/sh\n"
        f"'{leeward_bin_path()}' \"$@\" || exit $?\n"
        # leeward process --job DIR: $3 is the staging directory.
        'mv "$3/result.json" "$3/result.hidden"\n')
    wrapper.chmod(0o755)
    svc = slurm_service(tmp_path, slurm, grace=60.0,
                        slurm_extra=f'max_attempts = 1\nprogram = "{wrapper}"').start()
    deliver_renamed(files[0].read_bytes(), tmp_path / "in" / files[0].name)
    hidden = {}

    def result_hidden():
        found = list((tmp_path / "out" / "demo" / ".jobs").glob("*/result.hidden"))
        if found:
            hidden["path"] = found[0]
        return bool(found)

    wait_for(result_hidden, DEADLINE_S, "the job's result record written and hidden")
    job = records(svc, "submitted")[0]["job"]
    wait_for(lambda: squeue(slurm, "all").get(job, ("",))[0] == "COMPLETED", 60,
             f"Slurm shows job {job} COMPLETED")
    # Ten looks of the service (poll_s 0.3 s) at an ended job without a result.
    time.sleep(3.0)
    assert records(svc, "job_ended") == [] and records(svc, "failed") == [], \
        "the run was failed before result_grace_s had passed"
    os.rename(hidden["path"], hidden["path"].with_name("result.json"))
    wait_for(lambda: len(svc.published()) == 1, 60, "the step published")
    assert records(svc, "job_ended") == [] and records(svc, "failed") == []
    assert [r["job"] for r in records(svc, "submitted")] == [job], "one job, one attempt"
    assert sacct(slurm, job)[-1][2] == "COMPLETED"
    no_stray_files(tmp_path)
    assert svc.stop() == 0


def test_a_coordinator_killed_while_jobs_run_follows_them_again(tmp_path, slurm):
    leads = [0, 6, 12]
    files = demo_inputs(tmp_path / "gen", "2026031400", leads)
    svc = slurm_service(tmp_path, slurm, slurm_extra='setup = ["sleep 3"]').start()
    for f in files:
        deliver_renamed(f.read_bytes(), tmp_path / "in" / f.name)
    wait_running(slurm, "lw_demo_20260314T0000Z_000h", 60)
    svc.kill9()
    before = records(svc, "submitted")
    assert [r["step"]["lead"] for r in before] == [0]
    st = subprocess.run([str(leeward_bin_path()), "status", "--state-dir", str(tmp_path / "state")],
                        capture_output=True, text=True, timeout=30)
    assert f"+0h on the scheduler: job {before[0]['job']}, attempt 1" in st.stdout, st.stdout
    svc.start()
    wait_for(lambda: len(svc.published()) == 3, DEADLINE_S, "three steps published")
    time.sleep(1.0)
    pubs = svc.published()
    assert sorted(r["step"]["lead"] for r in pubs) == leads, "nothing lost, nothing doubled"
    subs = records(svc, "submitted")
    assert sorted(r["step"]["lead"] for r in subs) == leads, "no step submitted twice"
    assert records(svc, "job_ended") == []
    for r in subs:
        assert sacct(slurm, r["job"])[-1][2] == "COMPLETED"
    log = svc.log.read_text()
    assert "step job from before the restart followed again" in log
    no_stray_files(tmp_path)
    assert svc.stop() == 0


@pytest.mark.parametrize("point", ["after-move-3", "before-record"])
def test_a_coordinator_killed_while_it_publishes_a_jobs_result_finishes_it_at_start(
        tmp_path, slurm, point):
    """The result of the +6 h job changes the +12 h file already published:
    the coordinator aborts (its test-only hook LEEWARD_TEST_CRASH_AT) after
    the +12 h file was renamed and before its manifest was (after-move-3), or
    after every rename and before the ledger's `published` record. At the
    next start the publication recorded in the ledger is finished: every
    manifest describes its file (size and SHA-256, hashlib), the +12 h
    manifest is at revision 2, as in a run without a crash, and the step is
    recorded published once."""
    files = dict(zip([0, 6, 12], demo_inputs(tmp_path / "gen", "2026031400", [0, 6, 12])))
    svc = slurm_service(tmp_path, slurm).start()
    for k, lead in enumerate([0, 12], start=1):
        deliver_renamed(files[lead].read_bytes(), tmp_path / "in" / files[lead].name)
        wait_for(lambda: len(svc.published()) == k, DEADLINE_S, f"+{lead} h published")
    assert svc.stop() == 0
    svc = slurm_service(tmp_path, slurm)
    svc.env["LEEWARD_TEST_CRASH_AT"] = point
    svc.start()
    deliver_renamed(files[6].read_bytes(), tmp_path / "in" / files[6].name)
    wait_for(lambda: svc.proc.poll() is not None, DEADLINE_S, f"the coordinator aborted at {point}")
    svc.logf.close()
    intent = [r for r in records(svc, "publishing") if r["step"]["lead"] == 6]
    assert len(intent) == 1 and ".jobs" in intent[0]["stage"], intent
    del svc.env["LEEWARD_TEST_CRASH_AT"]
    svc.start()
    wait_for(lambda: len(svc.published()) == 3, DEADLINE_S, "+6 h published after the restart")
    assert svc.stop() == 0
    assert sorted(r["step"]["lead"] for r in svc.published()) == [0, 6, 12]
    revisions = {}
    for m_path in sorted((tmp_path / "out").rglob("*.json")):
        if ".jobs" in m_path.parts:
            continue
        m = json.loads(m_path.read_text())
        product = m_path.parent / m["product"]
        assert m["product_bytes"] == product.stat().st_size, m_path
        assert m["product_checksum"] == hashlib.sha256(product.read_bytes()).hexdigest(), m_path
        revisions[m["lead_hours"]] = m["revision"]
    assert revisions == {0: 1, 6: 1, 12: 2}, revisions
    assert "publication cut short by a stop finished" in svc.log.read_text()
    assert len(records(svc, "submitted")) == 3, "the job's result was not made again"
    no_stray_files(tmp_path)


def test_an_unreachable_scheduler_falls_back_to_local_and_says_so(tmp_path):
    # A configuration that points at no controller: sbatch cannot submit.
    files = demo_inputs(tmp_path / "gen", "2026031400", [0, 6])
    bogus = tmp_path / "nowhere.conf"
    bogus.write_text("ClusterName=none\nSlurmctldHost=localhost(127.0.0.1)\nSlurmctldPort=9\n")
    svc = slurm_service(tmp_path, {"SLURM_CONF": str(bogus)},
                        slurm_extra="command_timeout_s = 5.0").start()
    for f in files:
        deliver_renamed(f.read_bytes(), tmp_path / "in" / f.name)
    wait_for(lambda: len(svc.published()) == 2, DEADLINE_S, "both steps published locally")
    assert records(svc, "submitted") == []
    code, body = svc.get("/health")
    assert code == 200 and "scheduler: unusable" in body and "run on this machine" in body, body
    assert svc.metric("leeward_scheduler_up") == 0
    assert svc.metric("leeward_scheduler_local_fallback_total") == 2
    assert "scheduler cannot be used" in svc.log.read_text()
    no_stray_files(tmp_path)
    assert svc.stop() == 0
