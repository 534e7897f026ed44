"""scripts/provision, as `make test` runs it: on a machine without the browser it installs
Chromium when it may (root or password-less sudo), and otherwise stops with one line saying
what to run. The system commands (id, sudo, apt-get) are stand-ins on a private PATH, so the
machine's own browser is never touched."""

import shutil
import stat
import subprocess
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]
SCRIPT = ROOT / "scripts" / "provision"
SH = shutil.which("sh") or "/bin/sh"


def _tool(bin_dir: Path, name: str, body: str) -> None:
    p = bin_dir / name
    p.write_text(f"#!{SH}\n{body}\n")
    p.chmod(p.stat().st_mode | stat.S_IXUSR)


def _machine(tmp_path: Path, uid: int, sudo: bool, apt_works: bool = True) -> Path:
    """A PATH with only id, optionally sudo, and an apt-get that logs and 'installs'."""
    bin_dir = tmp_path / "bin"
    bin_dir.mkdir()
    _tool(bin_dir, "id", f"echo {uid}")
    if sudo:
        _tool(bin_dir, "sudo", 'if [ "$1" = -n ]; then shift; fi\n[ "$1" = true ] && exit 0\n'
                               'echo sudo "$@" >> "$(dirname "$0")/../log"\n'
                               'SUDO_USED=1 "$@"')
    install = (f'printf "#!{SH}\\nexit 0\\n" > "$(dirname "$0")/chromium"; '
               'chmod +x "$(dirname "$0")/chromium"' if apt_works else "exit 100")
    _tool(bin_dir, "apt-get", 'echo apt-get "$@" >> "$(dirname "$0")/../log"\n'
                              f'case "$*" in *install*) {install};; esac\nexit 0')
    _tool(bin_dir, "chmod", 'exec /bin/chmod "$@"' if Path("/bin/chmod").exists()
          else 'exec /usr/bin/chmod "$@"')
    _tool(bin_dir, "dirname", 'exec /usr/bin/dirname "$@"')
    return bin_dir


def _run(bin_dir: Path):
    return subprocess.run([SH, str(SCRIPT)], env={"PATH": str(bin_dir)},
                          capture_output=True, text=True, timeout=60)


def test_browser_present_nothing_to_do(tmp_path):
    bin_dir = _machine(tmp_path, uid=1000, sudo=False)
    _tool(bin_dir, "chromium", "exit 0")
    res = _run(bin_dir)
    assert res.returncode == 0 and res.stderr == ""
    assert not (tmp_path / "log").exists()


def test_root_installs_chromium_with_apt(tmp_path):
    bin_dir = _machine(tmp_path, uid=0, sudo=False)
    res = _run(bin_dir)
    assert res.returncode == 0, res.stderr
    log = (tmp_path / "log").read_text().splitlines()
    assert log[0].startswith("apt-get update")
    assert log[1].startswith("apt-get install -y") and log[1].endswith("chromium")
    assert (bin_dir / "chromium").exists()


def test_user_with_sudo_installs_through_sudo(tmp_path):
    bin_dir = _machine(tmp_path, uid=1000, sudo=True)
    res = _run(bin_dir)
    assert res.returncode == 0, res.stderr
    log = (tmp_path / "log").read_text()
    assert "sudo apt-get install -y" in log and (bin_dir / "chromium").exists()


@pytest.mark.parametrize("uid,sudo,apt_works,says", [
    (1000, False, True, "run 'sudo apt-get install -y chromium'"),
    (0, False, False, "run 'apt-get install -y chromium' to see why"),
])
def test_cannot_install_one_line_saying_what_to_run(tmp_path, uid, sudo, apt_works, says):
    bin_dir = _machine(tmp_path, uid=uid, sudo=sudo, apt_works=apt_works)
    res = _run(bin_dir)
    assert res.returncode == 1
    lines = [ln for ln in res.stderr.splitlines() if not ln.startswith("provision: installing")]
    assert len(lines) == 1 and says in lines[0], res.stderr
    assert not (bin_dir / "chromium").exists()


def test_make_test_and_ci_use_the_provisioning():
    make = (ROOT / "Makefile").read_text()
    assert "scripts/provision" in make
    # `make test` depends on the provision target, and CI runs `make test`
    test_rule = next(ln for ln in make.splitlines() if ln.startswith("test:"))
    assert "provision" in test_rule
    ci = (ROOT / ".ci" / "run").read_text()
    assert "make test" in ci and "apt-get remove" in ci
