"""Every command shown in README.md, DEVELOPERS.md, demo-data/README.md and docs/*.md, read as a
newcomer would: each shell line of each fenced sh/bash block is collected and
checked according to what it is.

- leeward commands: first run with `--help` appended, which makes leeward parse
  the whole line (command, options, values): an option or command that does not
  exist, or a value of the wrong kind, fails the test. Then, where everything
  the command reads is in the repository (inspect, check-config, process,
  completions, man on repository files), the command is run for real and must
  succeed; output directories are moved under the test's temporary directory.
  Commands that need a running service or the machine's own paths (serve,
  status, reprocess on /var/lib/leeward, demo) are run for real by the other
  tests (service, demo).
- Scripts of the repository (`bash some/script.sh`): the script must exist
  and pass `bash -n` (syntax); the suite runs the two of the quick start.
- Files the commands install or copy from the repository must exist.
- Host administration (systemctl, journalctl, systemd-*, install, useradd,
  usermod, runuser, cp to /etc): needs a host run by systemd, which this test
  machine is not; they are listed in the output, and the unit they act on is
  verified by test_service.py with systemd-analyze.
"""

from __future__ import annotations

import re
import shlex
import subprocess
from pathlib import Path

import pytest

from conftest import REPO_ROOT, leeward_bin_path

DOCS = [REPO_ROOT / "README.md", REPO_ROOT / "DEVELOPERS.md", REPO_ROOT / "demo-data" / "README.md",
        *sorted((REPO_ROOT / "docs").glob("*.md"))]
FENCE = re.compile(r"^```(sh|bash|shell|console)\s*$")
HOST = {"systemctl", "journalctl", "systemd-analyze", "systemd-tmpfiles", "systemd-sysusers",
        "install", "useradd", "usermod", "runuser", "sudo", "cp", "chmod", "chown", "mkdir",
        "cargo", "curl", "apt-get", "ncdump", "python3", "pip", "git", "export", "cd", "ls",
        "tail", "cat", "kill", "pkill", "rm", "mv", "sleep", "for", "done", "do", "echo", "ln"}


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


def split(cmd: str) -> list[str]:
    # Comments after the command; pipes and && chains are checked part by part.
    try:
        words = shlex.split(cmd, comments=True)
    except ValueError:
        return shlex.split(cmd.split("#")[0])
    return words


def parts(cmd: str):
    words = split(cmd)
    cur = []
    for w in words:
        if w in ("|", "&&", "||", ";"):
            if cur:
                yield cur
            cur = []
        else:
            cur.append(w)
    if cur:
        yield cur


def test_the_docs_show_commands_at_all():
    assert len(ALL) > 20, ALL
    assert any("serve" in c for _, _, c in ALL)


RAN: list = []
#: Commands whose work needs nothing outside the repository: run for real.
REAL = {"inspect", "check-config", "process", "completions", "man"}


def runnable(args, tmp):
    """The command as it can be run here for real, or None: every input it names is in
    the repository, and the directories it writes (--out) are moved under the test's own
    temporary directory."""
    if not args or args[0] not in REAL:
        return None
    out, k = [], 0
    while k < len(args):
        a = args[k]
        if a == "--out" and k + 1 < len(args):
            out += [a, str(tmp / Path(args[k + 1]).name.strip("/") or "out")]
            k += 2
            continue
        if not a.startswith("-") and ("/" in a or a.endswith((".grib2", ".toml"))):
            if not (REPO_ROOT / a).exists():
                return None
        out.append(a)
        k += 1
    return out


@pytest.mark.parametrize("doc,line,cmd", ALL, ids=[f"{d}:{n}" for d, n, _ in ALL])
def test_each_command_works_as_written(doc, line, cmd, tmp_path):
    for words in parts(cmd):
        prog = Path(words[0]).name
        if words[0].startswith("<") or "=" in words[0] and not words[0].startswith("-"):
            # VAR=value leeward ...: the environment assignment, then the command.
            while words and "=" in words[0] and not words[0].startswith("-"):
                words = words[1:]
            if not words:
                continue
            prog = Path(words[0]).name
        if prog == "leeward":
            args = [a for a in words[1:]]
            r = subprocess.run([str(leeward_bin_path()), *args, "--help"], capture_output=True,
                               text=True, timeout=60)
            assert r.returncode == 0, f"{doc}:{line}: `{cmd}` is not a valid leeward command:\n{r.stderr}"
            real = runnable(args, tmp_path)
            if real is not None:
                r = subprocess.run([str(leeward_bin_path()), *real], capture_output=True, text=True,
                                   timeout=300, cwd=REPO_ROOT)
                assert r.returncode == 0, f"{doc}:{line}: `{cmd}` failed when run:\n{r.stdout[-2000:]}{r.stderr[-2000:]}"
                RAN.append(f"{doc}:{line}")
        elif prog == "bash" and len(words) > 1 and not words[1].startswith("-"):
            script = REPO_ROOT / words[1]
            assert script.is_file(), f"{doc}:{line}: {words[1]} does not exist"
            r = subprocess.run(["bash", "-n", str(script)], capture_output=True, text=True)
            assert r.returncode == 0, f"{doc}:{line}: {words[1]}: {r.stderr}"
        elif prog in HOST:
            for w in words[1:]:
                if w.startswith(("deploy/", "docs/", "demo-data/", "tests/")):
                    assert (REPO_ROOT / w.split(":")[0]).exists(), f"{doc}:{line}: {w} does not exist"
            print(f"host command, not run here: {doc}:{line}: {cmd}")
        else:
            pytest.fail(f"{doc}:{line}: `{cmd}`: a command this test does not know how to check "
                        f"({prog}); add it to the test's rules")


def test_some_commands_ran_for_real():
    # Runs after the parametrised test in file order (pytest keeps it).
    assert len(RAN) >= 3, RAN
