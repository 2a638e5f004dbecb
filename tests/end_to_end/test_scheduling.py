"""The scheduler kit in jobs/ and `bigsmooth init`.

References: systemd's own unit checker (systemd-analyze verify; skipped where systemd is absent),
bash running jobs/nightly.sh, and the exit-code table of bigsmooth/errors.py (the one source the
unit file's comments and restart policy are generated from)."""

import os
import shutil
import stat
import subprocess
import sys
import tomllib

import pytest

from bigsmooth import errors
from bigsmooth.errors import EXIT_CANTCREAT, EXIT_GATE, EXIT_OK
from helpers import ROOT, _small_table, _write_case, cli

JOBS = os.path.join(ROOT, "jobs")
UNITS = ("bigsmooth.service", "bigsmooth.timer", "bigsmooth-alert@.service")


def _block(text, start, end):
    return text.split(start, 1)[1].split("\n", 1)[1].split(end, 1)[0].rstrip("\n")


def test_unit_file_tables_are_generated_from_errors():
    text = open(os.path.join(JOBS, "bigsmooth.service")).read()
    assert _block(text, "# exit-codes:start", "# exit-codes:end") == errors.shell_comment()
    assert _block(text, "# restart-policy:start", "# restart-policy:end") == errors.systemd_restart()
    # the codes that need a person never restart; 75 (retry later) does
    prevent = errors.systemd_restart().split("RestartPreventExitStatus=")[1].split()
    assert "75" not in prevent and {"3", "65"} <= set(prevent)


@pytest.mark.skipif(shutil.which("systemd-analyze") is None, reason="systemd-analyze not installed")
def test_systemd_units_pass_systemd_analyze_verify(tmp_path):
    exe = shutil.which("bigsmooth", path=os.path.dirname(sys.executable)) or "/bin/true"
    for name in UNITS:  # ExecStart must name an executable that exists here
        text = open(os.path.join(JOBS, name)).read().replace("/opt/bigsmooth/.venv/bin/bigsmooth", exe)
        (tmp_path / name).write_text(text)

    def verify(*names):
        return subprocess.run(
            ["systemd-analyze", "verify", *names], cwd=tmp_path, capture_output=True, text=True
        )

    res = verify(*UNITS)
    assert res.returncode == 0 and res.stdout + res.stderr == "", res.stdout + res.stderr
    # the check can fail: a misspelt key is reported
    (tmp_path / "bad.service").write_text(
        (tmp_path / "bigsmooth.service").read_text().replace("StartLimitBurst", "StartLimitBurstt")
    )
    assert "Unknown key" in verify("bad.service").stderr


def test_nightly_script_retries_exit_75_then_passes_the_code_on(tmp_path):
    # a stand-in for bigsmooth that answers 75 twice, then 0 (counting its calls in a file)
    fake = tmp_path / "fake-bigsmooth"
    fake.write_text(
        '#!/usr/bin/env bash\nn=$(cat "$COUNT" 2>/dev/null || echo 0); echo $((n + 1)) > "$COUNT"\n'
        '[ "$n" -lt 2 ] && exit 75; echo "args: $*"; exit 0\n'
    )
    fake.chmod(fake.stat().st_mode | stat.S_IXUSR)
    env = {**os.environ, "BIGSMOOTH": str(fake), "COUNT": str(tmp_path / "n"), "BIGSMOOTH_RETRY_SECONDS": "0"}
    script = os.path.join(JOBS, "nightly.sh")
    res = subprocess.run(
        [script, "cfg.toml", "--set", "solve.lam=2"], env=env, capture_output=True, text=True
    )
    assert res.returncode == 0 and (tmp_path / "n").read_text().strip() == "3"
    assert "args: run cfg.toml --set solve.lam=2" in res.stdout
    (tmp_path / "n").write_text("0")
    res = subprocess.run(
        [script, "cfg.toml"], env={**env, "BIGSMOOTH_RETRIES": "1"}, capture_output=True, text=True
    )
    assert res.returncode == 75 and "exited 75 (attempt 2)" in res.stderr
    assert subprocess.run([script], env=env, capture_output=True).returncode == 64


def test_orchestrator_task_reads_the_result(tmp_path):
    sys.path.insert(0, JOBS)
    try:
        import orchestrator_task as task
    finally:
        sys.path.remove(JOBS)
    cfg = _write_case(tmp_path, _small_table(300, seed=8), "\n[gates]\nmax_auc_drop = 1.0\n")
    env_cmd = [sys.executable, "-m", "bigsmooth"]
    res = task.run_nightly(str(cfg), command=env_cmd, retries=0)
    assert res["status"] == "published" and (tmp_path / "out" / res["output_version"]).is_dir()
    with pytest.raises(task.NightlyFailed) as held:
        task.run_nightly(str(cfg), "--set", "gates.min_neighbour_consistency=1.0", command=env_cmd, retries=0)
    assert held.value.result["status"] == "held" and held.value.result["exit_code"] == EXIT_GATE
    assert "min_neighbour_consistency" in str(held.value)


def test_init_writes_the_template_and_the_kit_and_never_overwrites(tmp_path):
    res = cli("init", str(tmp_path / "job"))
    assert res.returncode == EXIT_OK, res.stderr
    job = tmp_path / "job"
    assert (job / "bigsmooth.toml").read_text() == open(os.path.join(ROOT, "configs", "template.toml")).read()
    shipped = sorted(p for p in os.listdir(JOBS) if not p.startswith((".", "__")))
    assert sorted(os.listdir(job / "jobs")) == shipped
    for name in shipped:
        assert (job / "jobs" / name).read_bytes() == open(os.path.join(JOBS, name), "rb").read()
    assert os.access(job / "jobs" / "nightly.sh", os.X_OK)
    (job / "bigsmooth.toml").write_text("# mine\n")
    res = cli("init", str(job))
    assert res.returncode == EXIT_CANTCREAT and "--force" in res.stderr
    assert (job / "bigsmooth.toml").read_text() == "# mine\n"
    assert cli("init", str(job), "--force").returncode == EXIT_OK
    assert (job / "bigsmooth.toml").read_text().startswith("# bigsmooth job config")


def test_the_package_carries_the_template_and_the_kit():
    # a wheel maps configs/ and jobs/ into the package (pyproject.toml); every file init copies
    # comes from those two folders
    py = tomllib.loads(open(os.path.join(ROOT, "pyproject.toml")).read())["tool"]["setuptools"]
    assert py["package-dir"] == {"bigsmooth.configs": "configs", "bigsmooth.jobs": "jobs"}
    assert {"bigsmooth.configs", "bigsmooth.jobs"} <= set(py["packages"])
    assert py["package-data"]["bigsmooth.jobs"] == ["*"]
    from bigsmooth.kit import kit_files

    for rel, src in kit_files().items():
        assert os.path.dirname(os.path.abspath(src)) in (os.path.join(ROOT, "configs"), JOBS), rel
