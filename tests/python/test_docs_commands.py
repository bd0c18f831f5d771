"""Every command shown in README.md, DEVELOPERS.md, demo-data/README.md and docs/*.md, run as
a newcomer would type it: each shell line of each fenced sh/bash block, in the order of
the page, in a working directory of its own that looks like the one the docs assume.

The working directory (one per test session, under pytest's temporary directory):

- ``work/``, the current directory of every command: a copy of the repository's
  ``deploy/`` and ``demo-data/``; ``target/debug/leeward`` and ``target/release/leeward``
  (and ``leeward`` on the PATH) are the binary under test (``$LEEWARD_BIN``); the inputs the
  docs name as one's own files are given from the demo's data
  (``model-output/step-024.grib2`` is demo-data/grib2/lwdemo_2026031400_024.grib2,
  ``step-006.grib2`` and ``regional_2026031400_f036.grib2`` are steps the demo wrote).
- The machine's own paths in a command are moved into the working directory: ``/tmp/...``
  to ``tmp/...``; ``/srv/leeward``, ``/var/lib/leeward`` and ``/etc/leeward`` to the tree
  of the machine the page is about: docs/operations.md speaks of a service host (``host/``),
  the other pages of a newcomer's own machine (``desk/``); the metrics port 7478 to a free
  port of each. ``deploy/leeward.toml`` in ``work/`` is the repository's with the same moves.
- The demo is run once, as README.md's first hour shows it (the first
  ``leeward demo --dir DIR`` line), so that the commands that look at its products and
  state find them.
- The service host of docs/operations.md is set up as the page says (the tmpfiles
  directories, the example configuration installed in /etc/leeward with the page's demo
  feed added, ``/srv/leeward/incoming/regional/regional_2026031400_f006.grib2`` delivered),
  and ``leeward serve`` is started with the unit's own ExecStart=, standing in for
  ``systemctl enable --now leeward``; it is stopped with SIGTERM at the end and must exit 0.

What is done with each line:

- leeward: first parsed with ``--help`` appended (an option or command that does not exist,
  or a value of the wrong kind, fails with a clear message), then run for real by bash,
  and it must succeed. ``leeward serve`` is started, must come up (its /health answers, or
  it logs that it started), and must exit 0 within 60 s of SIGTERM. After ``leeward
  reprocess`` on the running host, the service must take the request within 10 s.
- ls, cat, cp, mv, mkdir, curl, ncdump, python3: run for real by bash (ncdump, from Debian's
  netcdf-bin, is skipped with a message where it is not installed). A listing of the host's
  products first waits until the host's service has published what was delivered to it.
- ``runuser -u leeward -- leeward ...``: the leeward command is run for real as the test's
  own user (there is no user leeward here). ``leeward completions SHELL | install ...``:
  the leeward part is run for real; installing the output is host administration.
- Scripts of the repository (``bash some/script.sh``): the script must exist and pass
  ``bash -n``; they are not run here. demo-data/run-demo.sh builds leeward, then runs the
  same ``leeward demo`` that the README.md line above runs for real; tests/run-all.sh is
  the suite itself; the benchmark (tests/bench/run.sh) is never run by a test.
- Host administration (systemctl, journalctl, systemd-*, install, useradd, usermod,
  apt-get, cargo, git, cd into a fresh clone): not run, listed with the reason in the
  summary; files of the repository they name must exist. The unit they act on is verified
  by test_service.py with systemd-analyze.

The summary at the end says how many lines ran for real and how many are host
administration; every leeward line must have run for real, or be in NOT_RUN with a reason.
"""

from __future__ import annotations

import os
import re
import shlex
import shutil
import signal
import socket
import subprocess
import time
import tomllib
import urllib.request
from pathlib import Path

import pytest

from conftest import FIGURES, REPO_ROOT, leeward_bin_path

DOCS = [REPO_ROOT / "README.md", REPO_ROOT / "DEVELOPERS.md", REPO_ROOT / "demo-data" / "README.md",
        *sorted((REPO_ROOT / "docs").glob("*.md"))]
OPERATIONS = Path("docs/operations.md")
FENCE = re.compile(r"^```(sh|bash|shell|console)\s*$")
RUN_TIMEOUT_S = 180

#: Programs run for real (after the machine's paths are moved into the working directory).
REAL = {"leeward", "ls", "cat", "tail", "head", "cp", "mv", "mkdir", "curl", "ncdump", "python3"}
#: Host administration: program -> why it is not run here.
HOST = {
    "systemctl": "needs a host run by systemd; here the test's own `leeward serve` stands in for the unit",
    "journalctl": "reads the systemd journal of the installed unit",
    "systemd-analyze": "checks the installed unit; test_service.py runs it on deploy/leeward.service",
    "systemd-tmpfiles": "makes the host's directories; the test makes the same ones in its host tree",
    "systemd-sysusers": "creates the host's system user",
    "install": "installs into the host's /usr/local and /etc; the test's host tree gets the same files",
    "useradd": "changes the host's users",
    "usermod": "changes the host's groups",
    "apt-get": "installs the host's system packages",
    "cargo": "builds leeward; the test runs the binary already built ($LEEWARD_BIN)",
    "git": "clones or tags the repository",
    "cd": "moves into the fresh clone that `git clone` makes",
    "squeue": "asks the site's Slurm cluster; test_slurm.py runs the service on a real one",
    "sacct": "asks the site's Slurm cluster; test_slurm.py runs the service on a real one",
}
#: leeward lines of the docs that are not run for real: "doc:line" -> reason. Keep it short.
NOT_RUN: dict[str, str] = {}


def commands():
    out = []
    for doc in DOCS:
        lines = doc.read_text().splitlines()
        inside = False
        buf = ""
        for n, line in enumerate(lines, 1):
            if not inside and FENCE.match(line.strip()):
                inside = True
                continue
            if inside and line.strip().startswith("```"):
                inside = False
                continue
            if not inside:
                continue
            text = line.strip()
            if text.startswith("$ "):
                text = text[2:]
            if not text or text.startswith("#"):
                continue
            if text.endswith("\\"):
                buf += text[:-1] + " "
                continue
            full = (buf + text).strip()
            buf = ""
            out.append((doc.relative_to(REPO_ROOT), n, full))
    return out


ALL = commands()
#: The demo as README.md's first hour runs it: run once for the session.
DEMO_LINE = next((d, n, c) for d, n, c in ALL
                 if re.match(r"(target/debug/)?leeward demo --dir \S+\s*$", c.split("#")[0].strip()))


def split(cmd: str) -> list[str]:
    # Comments after the command; pipes and && chains are checked part by part.
    try:
        return shlex.split(cmd, comments=True)
    except ValueError:
        return shlex.split(cmd.split("#")[0])


def parts(cmd: str):
    cur = []
    for w in split(cmd):
        if w in ("|", "&&", "||", ";"):
            if cur:
                yield cur
            cur = []
        else:
            cur.append(w)
    if cur:
        yield cur


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def health(listen: str) -> str | None:
    try:
        with urllib.request.urlopen(f"http://{listen}/health", timeout=2) as r:
            return r.read().decode().strip()
    except (OSError, ValueError):
        return None


def wait_for(cond, seconds: float) -> bool:
    end = time.monotonic() + seconds
    while time.monotonic() < end:
        if cond():
            return True
        time.sleep(0.2)
    return bool(cond())


class Machine:
    """The paths of one machine the docs speak of, moved into the working directory."""

    def __init__(self, scratch: Path, tree: Path):
        self.scratch = scratch
        self.tree = tree
        self.port = free_port()
        subs = {
            "/usr/local/bin/leeward": str(scratch / "bin" / "leeward"),
            "/tmp/": f"{scratch / 'tmp'}/",
            "/var/lib/leeward": str(tree / "var" / "lib" / "leeward"),
            "/srv/leeward": str(tree / "srv" / "leeward"),
            "/etc/leeward": str(tree / "etc" / "leeward"),
        }
        self._subs = subs
        self._paths = re.compile(r"(?<![\w./-])(" + "|".join(map(re.escape, subs)) + ")")

    def rewrite(self, text: str) -> str:
        text = self._paths.sub(lambda m: self._subs[m.group(1)], text)
        return text.replace("127.0.0.1:7478", f"127.0.0.1:{self.port}")

    def path(self, doc_path: str) -> Path:
        return Path(self.rewrite(doc_path))


class Newcomer:
    """The session's working directory: see the module's docstring."""

    def __init__(self, scratch: Path):
        self.scratch = scratch
        self.work = scratch / "work"
        self.logs = scratch / "logs"
        self.desk = Machine(scratch, scratch / "desk")
        self.host = Machine(scratch, scratch / "host")
        for d in (self.work, self.logs, scratch / "tmp", scratch / "bin"):
            d.mkdir(parents=True, exist_ok=True)
        binary = leeward_bin_path().resolve()
        (scratch / "bin" / "leeward").symlink_to(binary)
        for profile in ("debug", "release"):
            (self.work / "target" / profile).mkdir(parents=True)
            (self.work / "target" / profile / "leeward").symlink_to(binary)
        shutil.copytree(REPO_ROOT / "deploy", self.work / "deploy")
        shutil.copytree(REPO_ROOT / "demo-data", self.work / "demo-data")
        cfg = self.work / "deploy" / "leeward.toml"
        cfg.write_text(self.desk.rewrite(cfg.read_text()))
        self.env = dict(os.environ, PATH=f"{scratch / 'bin'}{os.pathsep}{os.environ.get('PATH', '')}")
        self.env.pop("LEEWARD_LOG", None)
        self.demo = None

    def machine(self, doc: Path) -> Machine:
        return self.host if doc == OPERATIONS else self.desk

    def run_demo(self):
        """README.md's first-hour demo (the first `leeward demo --dir DIR` line of the docs),
        run once as written; its DIR is the one the following lines look at."""
        self.demo_line = DEMO_LINE
        doc, line, cmd = DEMO_LINE
        d = self.desk.path(opt(split(cmd), "--dir"))
        self.demo = self.bash(self.desk.rewrite(cmd))
        assert self.demo.returncode == 0, (f"{doc}:{line}: `{cmd}` failed:\n"
                                           f"{self.demo.stdout[-3000:]}{self.demo.stderr[-3000:]}")
        self.demo_dir = d
        gen = d / "generated" / "regional"
        # The docs' examples of one's own model output, from the demo's data.
        given = {
            "model-output/step-024.grib2": REPO_ROOT / "demo-data/grib2/lwdemo_2026031400_024.grib2",
            "step-006.grib2": gen / "lwdemo_2026031400_006.grib2",
            "regional_2026031400_f036.grib2": gen / "lwdemo_2026031400_036.grib2",
        }
        for name, src in given.items():
            (self.work / name).parent.mkdir(parents=True, exist_ok=True)
            shutil.copy(src, self.work / name)

    def bash(self, text: str, timeout: float = RUN_TIMEOUT_S) -> subprocess.CompletedProcess:
        return subprocess.run(["bash", "-o", "pipefail", "-c", text], capture_output=True, text=True,
                              timeout=timeout, cwd=self.work, env=self.env)


_SERVICES: list[subprocess.Popen] = []


def stop(proc: subprocess.Popen, timeout: float = 60) -> int | None:
    """SIGTERM, then the exit code; None (and SIGKILL) if it did not stop in time."""
    if proc.poll() is not None:
        return proc.returncode
    proc.send_signal(signal.SIGTERM)
    try:
        return proc.wait(timeout=timeout)
    except subprocess.TimeoutExpired:
        proc.kill()
        proc.wait(timeout=30)
        return None


class Service:
    """One `leeward serve` run as a doc's line or a unit's ExecStart= gives it."""

    def __init__(self, nc: Newcomer, text: str, name: str, env=None, for_the_line=True):
        self.text = text
        args = split(text)
        args = args[args.index("serve") + 1:]
        cfg = nc.work / opt(args, "--config")
        conf = tomllib.loads(cfg.read_text()).get("service", {})
        self.listen = conf.get("metrics_listen", "")
        self.log = nc.logs / f"{name}.log"
        self.logf = open(self.log, "wb")
        self.proc = subprocess.Popen(
            ["bash", "-c", "exec " + text], cwd=nc.work, stdout=self.logf, stderr=subprocess.STDOUT,
            env={**nc.env, "LEEWARD_LOG": "info", **(env or {})})
        if for_the_line:
            _SERVICES.append(self.proc)

    def log_tail(self) -> str:
        return self.log.read_text(errors="replace")[-3000:]

    def up(self) -> bool:
        if self.listen:
            return health(self.listen) == "ok"
        return "leeward serve started" in self.log.read_text(errors="replace")

    def wait_up(self):
        wait_for(lambda: self.proc.poll() is not None or self.up(), 30)
        assert self.proc.poll() is None and self.up(), f"`{self.text}` did not come up:\n{self.log_tail()}"

    def stop(self) -> int | None:
        rc = stop(self.proc)
        self.logf.close()
        return rc


def opt(args: list[str], name: str) -> str | None:
    for k, a in enumerate(args):
        if a == name and k + 1 < len(args):
            return args[k + 1]
        if a.startswith(name + "="):
            return a.split("=", 1)[1]
    return None


@pytest.fixture(autouse=True)
def _no_service_outlives_its_test():
    """A line that fails half-way must not leave its service running (the host's service
    is stopped by its own fixture)."""
    yield
    while _SERVICES:
        p = _SERVICES.pop()
        if p.poll() is None:
            p.kill()
            p.wait(timeout=30)


@pytest.fixture(scope="session")
def newcomer(leeward_bin, tmp_path_factory) -> Newcomer:
    nc = Newcomer(tmp_path_factory.mktemp("newcomer"))
    nc.run_demo()
    return nc


class Host:
    """The service host of docs/operations.md, installed as the page says."""

    def __init__(self, nc: Newcomer):
        self.nc = nc
        m = self.m = nc.host
        ops = (REPO_ROOT / OPERATIONS).read_text()
        # systemd-tmpfiles --create: the shipped file, plus the line per feed the page adds.
        made = [ln.split()[1] for ln in (REPO_ROOT / "deploy/leeward.tmpfiles.conf").read_text().splitlines()
                if ln.startswith("d ")]
        made += re.findall(r"\bd (/srv/leeward/incoming/[\w-]+) 2775 ", ops)
        assert "/srv/leeward/incoming/demo" in made, "docs/operations.md no longer adds the demo feed's directory"
        for d in made:
            m.path(d).mkdir(parents=True, exist_ok=True)
        m.path("/var/lib/leeward").mkdir(parents=True, exist_ok=True)  # StateDirectory=leeward
        # The example configuration installed, with the demo feed of "Trying an installation".
        feeds = [b for b in re.findall(r"```toml\n(.*?)```", ops, re.S) if 'name = "demo"' in b]
        assert len(feeds) == 1, "docs/operations.md: the demo feed's TOML block is not found"
        self.config = m.path("/etc/leeward/leeward.toml")
        base = (REPO_ROOT / "deploy/leeward.toml").read_text()
        self.config.write_text(m.rewrite(base) + "\n" + feeds[0])
        r = subprocess.run([str(leeward_bin_path()), "check-config", str(self.config)],
                           capture_output=True, text=True, timeout=60)
        assert r.returncode == 0, f"the host's configuration (the example plus the page's demo feed):\n{r.stderr}"
        # A step of the example feed, delivered: docs/operations.md processes it by hand.
        f006 = m.path("/srv/leeward/incoming/regional/regional_2026031400_f006.grib2")
        shutil.copy(nc.demo_dir / "generated/regional/lwdemo_2026031400_006.grib2", f006)
        # systemctl enable --now leeward: the unit's ExecStart= and Environment=.
        unit = (REPO_ROOT / "deploy/leeward.service").read_text()
        exec_start = re.search(r"^ExecStart=(.*)$", unit, re.M).group(1)
        env = dict(e.split("=", 1) for e in re.findall(r"^Environment=(\S+)$", unit, re.M))
        self.service = Service(nc, m.rewrite(exec_start), "host-service", env=env,
                               for_the_line=False)
        try:
            self.service.wait_up()
        except BaseException:
            self.service.stop()
            raise

    def published_everything_delivered(self, seconds: float = 60):
        """Waits until every demo step delivered to the host has its manifest ("within
        seconds the products appear")."""
        inc = self.m.path("/srv/leeward/incoming/demo")
        out = self.m.path("/srv/leeward/products/demo")

        def done():
            want = {f"{p.name[7:15]}T{p.name[15:17]}00Z_{p.name[18:21]}h" for p in inc.glob("lwdemo_*.grib2")}
            have = {p.stem.split("_", 1)[1] for p in out.glob("*/*.json")}
            return want <= have

        assert wait_for(done, seconds), (f"the host's service did not publish {sorted(inc.glob('*'))} "
                                         f"within {seconds} s:\n{self.service.log_tail()}")

    def requests_taken(self, seconds: float = 10) -> bool:
        req = self.m.path("/var/lib/leeward/requests")
        return wait_for(lambda: not any(req.glob("*.json")), seconds)


@pytest.fixture(scope="module")
def host(newcomer):
    h = Host(newcomer)
    try:
        yield h
    finally:
        rc = h.service.stop()
    assert rc == 0, f"the host's `leeward serve` exited {rc} on SIGTERM:\n{h.service.log_tail()}"


def test_the_docs_show_commands_at_all():
    assert len(ALL) > 20, ALL
    assert any("serve" in c for _, _, c in ALL)


RAN: list[str] = []       # lines run for real (at least their leeward part)
PARTLY: list[str] = []    # of those, lines whose other part is host administration
HOSTED: dict[str, list[str]] = {}  # host-only lines by reason
SCRIPTS: list[str] = []   # lines that run a repository script: checked with bash -n
SKIPPED: list[str] = []
LEEWARD_LINES: list[str] = []


def program(words: list[str]) -> tuple[str, list[str]]:
    """The program of one part of a line and its words, past VAR=value assignments and a
    `runuser -u USER --` prefix."""
    while words and "=" in words[0] and not words[0].startswith("-"):
        words = words[1:]
    if words and words[0] == "runuser" and "--" in words:
        words = words[words.index("--") + 1:]
    return (Path(words[0]).name if words else ""), words


def kinds(cmd: str) -> list[tuple[str, list[str]]]:
    out = []
    for words in parts(cmd):
        prog, words = program(words)
        if prog == "bash" and len(words) > 1 and not words[1].startswith("-"):
            out.append(("script", words))
        elif prog in REAL:
            out.append(("real", words))
        elif prog in HOST:
            out.append(("host", words))
        else:
            out.append(("unknown", words))
    return out


@pytest.mark.parametrize("doc,line,cmd", ALL, ids=[f"{d}:{n}" for d, n, _ in ALL])
def test_each_command_works_as_written(doc, line, cmd, request):
    where = f"{doc}:{line}"
    ks = kinds(cmd)
    for kind, words in ks:
        if kind == "unknown":
            pytest.fail(f"{where}: `{cmd}`: a command this test does not know how to check "
                        f"({words[0] if words else ''}); add it to the test's rules")
    leeward_parts = [w for k, w in ks if k == "real" and Path(w[0]).name == "leeward"]
    if leeward_parts:
        LEEWARD_LINES.append(where)
    for words in leeward_parts:
        r = subprocess.run([str(leeward_bin_path()), *words[1:], "--help"], capture_output=True,
                           text=True, timeout=60)
        assert r.returncode == 0, f"{where}: `{cmd}` is not a valid leeward command:\n{r.stderr}"

    for kind, words in ks:
        if kind == "script":
            script = REPO_ROOT / words[1]
            assert script.is_file(), f"{where}: {words[1]} does not exist"
            r = subprocess.run(["bash", "-n", str(script)], capture_output=True, text=True)
            assert r.returncode == 0, f"{where}: {words[1]}: {r.stderr}"
        elif kind == "host":
            for w in words[1:]:
                if w.startswith(("deploy/", "docs/", "demo-data/", "tests/")):
                    assert (REPO_ROOT / w.split(":")[0]).exists(), f"{where}: {w} does not exist"

    real = [w for k, w in ks if k == "real"]
    hosted = [w for k, w in ks if k == "host"]
    if not real:
        if hosted:
            reason = HOST[Path(hosted[0][0]).name]
            HOSTED.setdefault(reason, []).append(where)
            print(f"host command, not run here: {where}: {cmd} ({reason})")
        else:
            SCRIPTS.append(where)
        return

    nc = request.getfixturevalue("newcomer")
    m = nc.machine(doc)
    h = request.getfixturevalue("host") if m is nc.host else None
    if any(Path(w[0]).name == "ncdump" for w in real) and shutil.which("ncdump") is None:
        SKIPPED.append(where)
        pytest.skip(f"{where}: ncdump is not installed (Debian netcdf-bin): `{cmd}` not run")
    # The whole line as typed, or, beside host administration, each part to run alone.
    whole = not hosted and not any(w[0] == "runuser" for w in parts(cmd))
    texts = [cmd] if whole else [shlex.join(w) for w in real]
    for text in texts:
        words = split(text)
        prog, words = program(words)
        run_one(nc, m, h, where, text, prog, words)
    RAN.append(where)
    if not whole:
        PARTLY.append(where)
        if hosted:
            reason = HOST[Path(hosted[0][0]).name]
            print(f"{where}: the leeward part ran; not run here: {shlex.join(hosted[0])} ({reason})")


def run_one(nc: Newcomer, m: Machine, h: Host | None, where: str, text: str, prog: str, words):
    args = words[1:]
    if prog == "leeward" and args[:1] == ["serve"]:
        s = Service(nc, m.rewrite(text), where.replace("/", "_").replace(":", "_"))
        s.wait_up()
        rc = s.stop()
        assert rc == 0, f"{where}: `{text}` exited {rc} on SIGTERM (0 expected within 60 s):\n{s.log_tail()}"
        return
    if where == "{}:{}".format(*nc.demo_line[:2]):
        return  # the session's demo, run once by the fixture (it must have succeeded)
    if h is not None and "/srv/leeward/products" in text:
        h.published_everything_delivered()
    r = nc.bash(m.rewrite(text))
    out = f"{r.stdout[-3000:]}{r.stderr[-3000:]}"
    print(f"{where}: $ {text}\n{out[-1500:]}")
    assert r.returncode == 0, f"{where}: `{text}` failed (exit {r.returncode}) when run:\n{out}"
    if prog == "leeward" and args[:1] == ["completions"]:
        assert len(r.stdout) > 1000, f"{where}: `{text}` printed no completion script:\n{out}"
    if prog == "curl" and "/health" in text:
        assert r.stdout.strip() == "ok", f"{where}: `{text}` answered {r.stdout!r}"
    if prog == "leeward" and args[:1] == ["reprocess"] and h is not None:
        assert h.requests_taken(), (f"{where}: the running service did not take the reprocess request "
                                    f"within 10 s:\n{out}\n{h.service.log_tail()}")


def test_every_leeward_line_ran_for_real():
    # Runs after the parametrised test in file order (pytest keeps it).
    if not LEEWARD_LINES:
        pytest.skip("no doc line was checked in this run")
    hosted = sum(len(v) for v in HOSTED.values())
    FIGURES.append(f"docs commands: {len(RAN)} lines ran for real ({len(PARTLY)} of them only their "
                   f"leeward part), {hosted} host administration only, {len(SCRIPTS)} scripts checked "
                   f"with bash -n, {len(SKIPPED)} skipped ({', '.join(SKIPPED) or 'none'})")
    for reason, lines in HOSTED.items():
        FIGURES.append(f"  host only ({reason}): {', '.join(lines)}")
    for where, reason in NOT_RUN.items():
        FIGURES.append(f"  leeward line not run: {where}: {reason}")
    missing = [w for w in LEEWARD_LINES if w not in RAN and w not in NOT_RUN]
    assert not missing, f"leeward lines of the docs that did not run for real: {missing}"
