"""The regeneration workflow end to end: gen --check/--diff, build, safe writes,
emitted tests and the pre-commit hook, through the real CLI in temporary folders and
temporary git repositories (no network)."""

from __future__ import annotations

import inspect
import os
import re
import shutil
import stat
import subprocess
import sys
from pathlib import Path

import pytest
from workflow_support import (
    BROKEN,
    CABLE,
    HEDGE,
    ROOT,
    THERMISTOR,
    THERMISTOR_RANGE_OPTION,
    THERMISTOR_RANGES,
    cli,
    exe,
    git,
    project,
    target,
    tool_path,
)

import gradwright
from gradwright.workflow import output

GEN = ("gen", "models/thermistor.py", "fit_loss", "--wrt", "a,b,c")
OUT = "models/thermistor_grad.py"


@pytest.fixture
def proj(tmp_path: Path) -> Path:
    return project(tmp_path, THERMISTOR, BROKEN, CABLE, HEDGE)


def _files(root: Path) -> dict[str, bytes]:
    return {
        p.relative_to(root).as_posix(): p.read_bytes()
        for p in sorted(root.rglob("*"))
        if p.is_file() and ".git" not in p.parts
    }


# ---------------------------------------------------------------------------------
# gen --check / --diff


def test_gen_check_is_zero_when_current_and_writes_nothing(proj: Path) -> None:
    assert cli(*GEN, "-o", OUT, cwd=proj).code == 0
    before = _files(proj)
    result = cli(*GEN, "-o", OUT, "--check", cwd=proj)
    assert result.code == 0, result.err
    assert "unchanged" in result.err and OUT in result.err
    assert _files(proj) == before


def test_gen_check_names_the_stale_file_and_exits_one(proj: Path) -> None:
    assert cli(*GEN, "-o", OUT, cwd=proj).code == 0
    model = proj / "models/thermistor.py"
    model.write_text(model.read_text().replace("err * err", "err * err * 2.0"))
    before = _files(proj)
    result = cli(*GEN, "-o", OUT, "--check", cwd=proj)
    assert result.code == 1
    assert f"stale     {OUT}" in result.err
    assert "regenerate with: gradwright gen models/thermistor.py" in result.err
    assert _files(proj) == before  # --check writes nothing


def test_gen_check_on_a_missing_output_says_missing(proj: Path) -> None:
    result = cli(*GEN, "-o", OUT, "--check", cwd=proj)
    assert result.code == 1
    assert not (proj / OUT).exists()
    assert (
        f"missing   {OUT}" in result.err and "write with: gradwright gen" in result.err
    )
    assert "stale" not in result.err


def test_gen_diff_prints_what_would_change_and_writes_nothing(proj: Path) -> None:
    assert cli(*GEN, "-o", OUT, cwd=proj).code == 0
    current = cli(*GEN, "-o", OUT, "--diff", cwd=proj)
    assert current.code == 0 and current.out == ""
    before = (proj / OUT).read_text()
    result = cli(*GEN[:-1], "a,b", "-o", OUT, "--diff", cwd=proj)
    assert result.code == 0  # --diff alone reports, like black's
    assert result.out.startswith(f"--- a/{OUT}\n+++ b/{OUT}\n")
    assert re.search(r"^-    c_bar = ", result.out, re.MULTILINE)  # c leaves wrt
    assert "+    return value, (a_bar, b_bar)\n" in result.out
    assert (proj / OUT).read_text() == before
    both = cli(*GEN[:-1], "a,b", "-o", OUT, "--diff", "--check", cwd=proj)
    assert both.code == 1 and both.out == result.out


def test_gen_diff_of_a_new_file_is_against_dev_null(proj: Path) -> None:
    result = cli(*GEN, "-o", OUT, "--diff", cwd=proj)
    assert result.out.startswith(f"--- /dev/null\n+++ b/{OUT}\n")
    assert not (proj / OUT).exists()


@pytest.mark.parametrize("flag", ["--check", "--diff", "--emit-test=t.py"])
def test_comparing_needs_an_output_path(proj: Path, flag: str) -> None:
    result = cli(*GEN, flag, cwd=proj)
    assert result.code == 2
    assert "needs -o OUT" in result.err


def test_gen_check_through_the_installed_command(proj: Path) -> None:
    assert cli(*GEN, "-o", OUT, cwd=proj).code == 0
    (proj / OUT).write_text((proj / OUT).read_text() + "# edited by hand\n")
    stale = exe(*GEN, "-o", OUT, "--check", cwd=proj)
    assert stale.code == 1 and OUT in stale.err
    assert "Traceback" not in stale.err


# ---------------------------------------------------------------------------------
# build


def test_build_generates_every_target_but_the_broken_one(proj: Path) -> None:
    result = exe("build", cwd=proj)
    assert result.code == 2  # a failed target is bad input
    lines = result.err.splitlines()
    assert "generated models/thermistor_grad.py" in lines
    assert "generated models/cable_sag_grad.py" in lines
    assert "generated models/fuel_hedge_grad.py" in lines
    assert "failed    models/broken_grad.py" in lines
    assert any(
        line.startswith("models/broken.py:2:5: error: with statements")
        for line in lines
    )
    assert lines[-1] == "build: 4 targets: 3 generated, 1 failed"
    assert "Traceback" not in result.err
    for name in ("thermistor", "cable_sag", "fuel_hedge"):
        assert (
            (proj / f"models/{name}_grad.py")
            .read_text()
            .startswith(output.HEADER_PREFIX)
        )
    assert not (proj / "models/broken_grad.py").exists()


def test_build_check_lists_every_stale_target(tmp_path: Path) -> None:
    root = project(tmp_path, THERMISTOR, CABLE, HEDGE)
    assert cli("build", cwd=root).code == 0
    current = cli("build", "--check", cwd=root)
    assert current.code == 0
    assert current.err.splitlines()[-1] == "build --check: 3 targets: 3 unchanged"
    for name in ("cable_sag", "fuel_hedge"):
        model = root / f"models/{name}.py"
        model.write_text(model.read_text() + "\nEXTRA = 1.0\n")
    before = _files(root)
    result = cli("build", "--check", cwd=root)
    assert result.code == 1
    lines = result.err.splitlines()
    assert "stale     models/cable_sag_grad.py" in lines
    assert "stale     models/fuel_hedge_grad.py" in lines
    assert "unchanged models/thermistor_grad.py" in lines
    assert "build --check: 3 targets: 2 stale, 1 unchanged" in lines
    assert lines[-1] == "run `gradwright build` to regenerate the stale files"
    assert _files(root) == before
    # regenerating makes the check pass again
    rebuilt = cli("build", cwd=root)
    assert rebuilt.code == 0
    assert "build: 3 targets: 2 generated, 1 unchanged" in rebuilt.err
    assert cli("build", "--check", cwd=root).code == 0


def test_build_check_with_a_broken_target_exits_two_and_still_lists_missing(
    proj: Path,
) -> None:
    result = cli("build", "--check", cwd=proj)
    assert result.code == 2
    assert result.err.count("missing   ") == 3  # never built
    assert "failed    models/broken_grad.py" in result.err


def test_build_diff_prints_diffs_and_writes_nothing(tmp_path: Path) -> None:
    root = project(tmp_path, THERMISTOR, CABLE)
    before = _files(root)
    result = cli("build", "--diff", cwd=root)
    assert result.code == 0
    assert "+++ b/models/thermistor_grad.py" in result.out
    assert "+++ b/models/cable_sag_grad.py" in result.out
    assert _files(root) == before


def test_build_quiet_prints_only_errors(proj: Path) -> None:
    result = cli("build", "--quiet", cwd=proj)
    assert result.code == 2
    assert "generated" not in result.err and "build:" not in result.err
    assert "failed    models/broken_grad.py" in result.err
    assert "with statements are not supported" in result.err


def test_build_quiet_is_silent_when_all_is_well(tmp_path: Path) -> None:
    root = project(tmp_path, THERMISTOR, CABLE)
    first = cli("build", "-q", cwd=root)
    assert (first.code, first.out, first.err) == (0, "", "")
    check = cli("build", "--check", "-q", cwd=root)
    assert (check.code, check.out, check.err) == (0, "", "")


def test_build_is_deterministic_and_matches_gen_from_the_project_folder(
    tmp_path: Path,
) -> None:
    root = project(tmp_path, THERMISTOR, CABLE)
    assert cli("build", cwd=root).code == 0
    first = _files(root)
    (root / OUT).unlink()
    assert cli("build", cwd=root).code == 0
    assert _files(root) == first
    # the header's command regenerates the same bytes
    assert cli(*GEN, "-o", OUT, "--check", cwd=root).code == 0


def test_build_from_a_subfolder_writes_the_same_bytes(tmp_path: Path) -> None:
    root = project(tmp_path, THERMISTOR)
    assert cli("build", cwd=root).code == 0
    expected = (root / OUT).read_bytes()
    (root / OUT).unlink()
    deep = root / "models" / "deeper"
    deep.mkdir()
    assert cli("build", cwd=deep).code == 0
    assert (root / OUT).read_bytes() == expected
    assert b"# source: models/thermistor.py\n" in expected


def test_build_creates_missing_output_folders(tmp_path: Path) -> None:
    root = project(
        tmp_path, target("models/cable_sag.py", ["rig_loss"], "gen/deep/cable.py")
    )
    assert cli("build", cwd=root).code == 0
    assert (root / "gen/deep/cable.py").is_file()


# ---------------------------------------------------------------------------------
# safe writes


def test_gen_refuses_to_overwrite_a_hand_written_file(proj: Path) -> None:
    mine = proj / OUT
    mine.write_text("def fit_loss_grad():\n    return 'my own work'\n")
    result = cli(*GEN, "-o", OUT, cwd=proj)
    assert result.code == 2
    assert result.err.startswith(f"{OUT}: error: refusing to overwrite")
    assert "--force" in result.err
    assert mine.read_text().endswith("'my own work'\n")
    forced = cli(*GEN, "-o", OUT, "--force", cwd=proj)
    assert forced.code == 0
    assert mine.read_text().startswith(output.HEADER_PREFIX)


def test_build_refuses_a_hand_written_file_and_builds_the_rest(tmp_path: Path) -> None:
    root = project(tmp_path, THERMISTOR, CABLE)
    mine = root / "models/cable_sag_grad.py"
    mine.write_text("# my notes\n")
    result = cli("build", cwd=root)
    assert result.code == 2
    assert "failed    models/cable_sag_grad.py" in result.err
    assert "models/cable_sag_grad.py: error: refusing to overwrite" in result.err
    assert "generated models/thermistor_grad.py" in result.err
    assert mine.read_text() == "# my notes\n"
    assert cli("build", "--force", cwd=root).code == 0
    assert mine.read_text().startswith(output.HEADER_PREFIX)


def test_an_empty_file_may_be_replaced(proj: Path) -> None:
    (proj / OUT).write_text("")
    assert cli(*GEN, "-o", OUT, cwd=proj).code == 0


def test_a_refused_test_file_stops_the_module_write_too(proj: Path) -> None:
    (proj / "tests").mkdir()
    (proj / "tests/test_mine.py").write_text("def test_mine():\n    pass\n")
    result = cli(*GEN, "-o", OUT, "--emit-test", "tests/test_mine.py", cwd=proj)
    assert result.code == 2
    assert "tests/test_mine.py: error: refusing" in result.err
    assert not (proj / OUT).exists()


def test_a_failed_generation_leaves_the_old_output_untouched(proj: Path) -> None:
    assert cli(*GEN, "-o", OUT, cwd=proj).code == 0
    old = (proj / OUT).read_bytes()
    model = proj / "models/thermistor.py"
    model.write_text(model.read_text().replace("return err * err", "while err:\n"))
    result = exe(*GEN, "-o", OUT, cwd=proj)
    assert result.code == 2
    assert result.err.startswith("models/thermistor.py:")
    assert (proj / OUT).read_bytes() == old
    assert [p.name for p in (proj / "models").glob(".*")] == []


def test_a_failure_mid_write_leaves_the_old_file_intact(
    proj: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    assert cli(*GEN, "-o", OUT, cwd=proj).code == 0
    old = (proj / OUT).read_bytes()
    real_fdopen = os.fdopen

    class DiskFull:
        """A file handle that writes half of what it is given, then fails."""

        def __init__(self, handle) -> None:
            self.handle = handle

        def __enter__(self):
            return self

        def __exit__(self, *exc) -> None:
            self.handle.close()

        def write(self, text: str) -> int:
            self.handle.write(text[: len(text) // 2])
            self.handle.flush()
            raise OSError(28, "No space left on device")

    monkeypatch.setattr(
        output.os, "fdopen", lambda *a, **k: DiskFull(real_fdopen(*a, **k))
    )
    result = cli(*GEN[:-1], "a,b", "-o", OUT, cwd=proj)
    assert result.code == 2
    assert result.err.startswith(f"{OUT}: error: cannot write: No space left")
    assert "Traceback" not in result.err
    assert (proj / OUT).read_bytes() == old
    assert sorted(p.name for p in (proj / "models").iterdir() if p.name[0] == ".") == []


def test_a_failed_rename_leaves_the_old_file_and_no_temporary(
    proj: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    assert cli(*GEN, "-o", OUT, cwd=proj).code == 0
    old = (proj / OUT).read_bytes()

    def refuse(src: str, dst: str) -> None:
        assert Path(src).read_text().startswith(output.HEADER_PREFIX)  # fully written
        raise PermissionError(13, "Permission denied")

    monkeypatch.setattr(output.os, "replace", refuse)
    result = cli(*GEN[:-1], "a", "-o", OUT, cwd=proj)
    assert result.code == 2
    assert "cannot write: Permission denied" in result.err
    assert (proj / OUT).read_bytes() == old
    assert [p.name for p in (proj / "models").glob(".*")] == []


def test_replacing_keeps_the_file_mode(proj: Path) -> None:
    assert cli(*GEN, "-o", OUT, cwd=proj).code == 0
    umask = os.umask(0)
    os.umask(umask)
    assert stat.S_IMODE((proj / OUT).stat().st_mode) == 0o666 & ~umask
    (proj / OUT).chmod(0o640)
    assert cli(*GEN[:-1], "a", "-o", OUT, cwd=proj).code == 0
    assert stat.S_IMODE((proj / OUT).stat().st_mode) == 0o640


# ---------------------------------------------------------------------------------
# --target


def test_generate_takes_the_target_keyword() -> None:
    parameters = inspect.signature(gradwright.generate).parameters
    assert parameters["target"].kind is inspect.Parameter.KEYWORD_ONLY
    assert parameters["target"].default == "cpython"


def test_target_option(proj: Path) -> None:
    result = cli(*GEN, "--target", "micropython", "-o", OUT, cwd=proj)
    assert result.code == 0, result.err
    assert "# target: micropython" in (proj / OUT).read_text()
    default = cli(*GEN, "-o", OUT, "--force", cwd=proj)
    explicit = cli(*GEN, "--target", "cpython", "-o", OUT, "--check", cwd=proj)
    assert (default.code, explicit.code) == (0, 0)
    assert cli(*GEN, "--target", "pypy", cwd=proj).code == 2


# ---------------------------------------------------------------------------------
# --emit-test


def _run_pytest(root: Path, path: str) -> subprocess.CompletedProcess:
    return subprocess.run(
        [sys.executable, "-m", "pytest", "-q", "-p", "no:cacheprovider", path],
        cwd=root,
        capture_output=True,
        text=True,
        timeout=120,
    )


def test_emitted_test_passes_under_pytest_and_catches_a_corruption(
    proj: Path,
) -> None:
    test = "tests/test_thermistor_grad.py"
    emit = (*GEN, "-o", OUT, "--emit-test", test, "--range", THERMISTOR_RANGE_OPTION)
    result = cli(*emit, cwd=proj)
    assert result.code == 0, result.err
    text = (proj / test).read_text()
    assert text.startswith(output.HEADER_PREFIX)
    assert "import gradwright" not in text
    assert f"--emit-test {test} --range" in text.splitlines()[3]
    run = _run_pytest(proj, test)
    assert run.returncode == 0, run.stdout + run.stderr
    assert "3 passed" in run.stdout
    # the emitted test can fail: break one adjoint by hand
    module = proj / OUT
    text, count = re.subn(
        r"^(\s+b_bar = )(.*)$", r"\1 2.0 * (\2)", module.read_text(), flags=re.M
    )
    assert count == 1
    module.write_text(text)
    broken = _run_pytest(proj, test)
    assert broken.returncode == 1
    assert "3 failed" in broken.stdout
    # and --check sees the edited module (the test file is still current)
    check = cli(*emit, "--check", cwd=proj)
    assert check.code == 1
    # (edited by hand: reported as such, not as merely stale)
    assert f"edited    {OUT}" in check.err and f"unchanged {test}" in check.err
    assert "edited by hand" in check.err


def test_emitted_test_from_config_is_deterministic(tmp_path: Path) -> None:
    root = project(
        tmp_path,
        THERMISTOR
        + 'emit-test = "tests/test_thermistor_grad.py"\n'
        + f"ranges = {{ {THERMISTOR_RANGES} }}\n",
        CABLE + 'emit-test = "tests/test_cable_grad.py"\n',
    )
    assert cli("build", cwd=root).code == 0
    first = _files(root)
    assert "tests/test_cable_grad.py" in first
    for path in ("tests/test_cable_grad.py", "tests/test_thermistor_grad.py"):
        (root / path).unlink()
    assert cli("build", cwd=root).code == 0
    assert _files(root) == first
    run = _run_pytest(root, "tests")
    assert run.returncode == 0, run.stdout + run.stderr
    assert "6 passed" in run.stdout


def test_a_range_for_no_parameter_is_an_error(proj: Path) -> None:
    result = cli(*GEN, "-o", OUT, "--emit-test", "t.py", "--range", "q=0:1", cwd=proj)
    assert result.code == 2
    assert "'q', which is not a parameter of 'fit_loss'" in result.err
    assert not (proj / OUT).exists()


# ---------------------------------------------------------------------------------
# the pre-commit hook, from a local configuration in a temporary git repository

MANIFEST = ROOT / ".pre-commit-hooks.yaml"


def _local_config(root: Path, hook_id: str) -> None:
    """A `repo: local` config using our manifest's hook, run with the installed
    gradwright (language: system) instead of a fresh virtualenv."""
    yaml = pytest.importorskip("yaml")
    hooks = yaml.safe_load(MANIFEST.read_text())
    hook = dict(next(h for h in hooks if h["id"] == hook_id))
    hook["language"] = "system"
    config = {"repos": [{"repo": "local", "hooks": [hook]}]}
    (root / ".pre-commit-config.yaml").write_text(yaml.safe_dump(config))


def _pre_commit(root: Path, *args: str) -> subprocess.CompletedProcess:
    return subprocess.run(
        [sys.executable, "-m", "pre_commit", *args],
        cwd=root,
        capture_output=True,
        text=True,
        timeout=300,
        env={
            **os.environ,
            "PATH": tool_path(),
            "PRE_COMMIT_HOME": str(root.parent / "pre-commit-home"),
            "PRE_COMMIT_COLOR": "never",
        },
    )


@pytest.fixture
def repo(tmp_path: Path) -> Path:
    pytest.importorskip("pre_commit", reason="pre-commit is not installed")
    root = project(tmp_path / "repo", THERMISTOR, CABLE)
    git("init", "-q", "-b", "main", cwd=root)
    git("config", "commit.gpgsign", "false", cwd=root)
    return root


def test_manifest_hooks_run_gradwright_build() -> None:
    yaml = pytest.importorskip("yaml")
    hooks = {h["id"]: h for h in yaml.safe_load(MANIFEST.read_text())}
    assert hooks["gradwright-check"]["entry"] == "gradwright build --check"
    assert hooks["gradwright-build"]["entry"] == "gradwright build --fail-if-changed"
    for hook in hooks.values():
        assert hook["language"] == "python"
        assert hook["pass_filenames"] is False


def test_pre_commit_check_hook_passes_when_current_and_fails_when_stale(
    repo: Path,
) -> None:
    _local_config(repo, "gradwright-check")
    assert cli("build", cwd=repo).code == 0
    git("add", "-A", cwd=repo)
    passed = _pre_commit(repo, "run", "--all-files")
    assert passed.returncode == 0, passed.stdout + passed.stderr
    assert "Passed" in passed.stdout
    model = repo / "models/cable_sag.py"
    model.write_text(model.read_text().replace("0.25", "0.5"))
    git("add", "-A", cwd=repo)
    failed = _pre_commit(repo, "run", "--all-files")
    assert failed.returncode == 1
    assert "stale     models/cable_sag_grad.py" in failed.stdout
    # installed as a git hook, it stops the commit
    assert _pre_commit(repo, "install").returncode == 0
    commit = git("commit", "-q", "-m", "tune weight", cwd=repo, check=False)
    assert commit.returncode != 0
    assert "stale     models/cable_sag_grad.py" in commit.stdout + commit.stderr
    assert cli("build", cwd=repo).code == 0
    git("add", "-A", cwd=repo)
    assert (
        git("commit", "-q", "-m", "tune weight", cwd=repo, check=False).returncode == 0
    )


def test_pre_commit_build_hook_regenerates_then_passes(repo: Path) -> None:
    _local_config(repo, "gradwright-build")
    git("add", "-A", cwd=repo)
    first = _pre_commit(repo, "run", "--all-files")
    assert first.returncode == 1  # new files: the commit stops for a review
    assert "files were regenerated: review and stage them" in first.stdout
    assert (repo / OUT).is_file()
    git("add", "-A", cwd=repo)
    second = _pre_commit(repo, "run", "--all-files")
    assert second.returncode == 0, second.stdout + second.stderr
    # an edit to a model regenerates a tracked file: pre-commit sees the change
    model = repo / "models/thermistor.py"
    model.write_text(model.read_text().replace("err * err", "err * err * 0.5"))
    git("add", "-A", cwd=repo)
    third = _pre_commit(repo, "run", "--all-files")
    assert third.returncode == 1
    assert "generated models/thermistor_grad.py" in third.stdout
    assert git("diff", "--name-only", cwd=repo).stdout == f"{OUT}\n"


def test_build_fail_if_changed(tmp_path: Path) -> None:
    root = project(tmp_path, CABLE)
    first = cli("build", "--fail-if-changed", cwd=root)
    assert first.code == 1
    assert cli("build", "--fail-if-changed", cwd=root).code == 0


def test_gen_and_build_never_run_the_model(tmp_path: Path) -> None:
    marker = tmp_path / "ran"
    model = (
        "import math\n"
        f"open({str(marker)!r}, 'w').close()\n\n\n"
        "def f(x):\n    return math.sin(x)\n"
    )
    root = project(tmp_path / "p", target("models/side.py", ["f"], "models/side_g.py"))
    (root / "models/side.py").write_text(model)
    assert cli("gen", "models/side.py", "f", "-o", "g.py", cwd=root).code == 0
    assert cli("build", cwd=root).code == 0
    assert cli("build", "--check", cwd=root).code == 0
    assert not marker.exists()
    # verify runs the generated module, which copies only the function
    assert cli("verify", "models/side.py", "f", cwd=root).code == 0
    assert not marker.exists()


def test_build_diff_alone_reports_what_would_change(tmp_path, monkeypatch, capsys):
    # review finding: `build --diff` without --check said "unchanged" for a stale one
    from gradwright.workflow.cli import main

    model = tmp_path / "m.py"
    model.write_text("def f(x):\n    return x * x\n", encoding="utf-8")
    (tmp_path / "pyproject.toml").write_text(
        '[[tool.gradwright.targets]]\nsource = "m.py"\nfunctions = ["f"]\n'
        'output = "m_grad.py"\n',
        encoding="utf-8",
    )
    monkeypatch.chdir(tmp_path)
    assert main(["build", "-q"]) == 0
    before = (tmp_path / "m_grad.py").read_bytes()
    model.write_text("def f(x):\n    return 3.0 * x * x\n", encoding="utf-8")
    capsys.readouterr()
    assert main(["build", "--diff"]) == 0
    captured = capsys.readouterr()
    assert "+    # return 3.0 * x * x" in captured.out
    report = captured.out + captured.err
    assert "would change m_grad.py" in report and "unchanged" not in report
    assert "build --diff: 1 target: 1 would change" in report
    assert (tmp_path / "m_grad.py").read_bytes() == before  # nothing written


# ---------------------------------------------------------------------------------
# the fast path: a current output is recognised from its header, without generating

HEAVY = ("libcst", "black", "jinja2")


@pytest.fixture
def built(tmp_path: Path) -> Path:
    root = project(tmp_path, THERMISTOR, CABLE, HEDGE)
    assert cli("build", cwd=root).code == 0
    return root


@pytest.fixture
def generations(monkeypatch: pytest.MonkeyPatch) -> list[str]:
    """Counts full generations (in this process: use -j 1)."""
    from gradwright.workflow import regen

    calls: list[str] = []
    real = regen.generate_module

    def counted(job: regen.Job, source: str) -> str:
        calls.append(job.source)
        return real(job, source)

    monkeypatch.setattr(regen, "generate_module", counted)
    return calls


def _restamp(text: str, old: str, new: str) -> str:
    """The file as if generated with ``old`` replaced: its digest made to match."""
    from gradwright.header import DIGEST_PREFIX, stamp

    lines = text.splitlines(keepends=True)
    unstamped = "".join(line for line in lines if not line.startswith(DIGEST_PREFIX))
    return stamp(unstamped.replace(old, new))


def test_current_outputs_are_checked_without_generating(
    built: Path, generations: list[str]
) -> None:
    check = cli("build", "--check", "-j", "1", cwd=built)
    assert check.code == 0, check.err
    assert check.err.splitlines()[-1] == "build --check: 3 targets: 3 unchanged"
    assert cli("build", "-j", "1", cwd=built).code == 0
    gen = cli(*GEN, "-o", OUT, "--check", cwd=built)
    assert gen.code == 0 and f"unchanged {OUT}" in gen.err
    assert generations == []


def test_a_stale_source_falls_back_to_one_generation(
    built: Path, generations: list[str]
) -> None:
    model = built / "models/cable_sag.py"
    model.write_text(model.read_text() + "\nEXTRA = 1.0\n")
    result = cli("build", "--check", "-j", "1", cwd=built)
    assert result.code == 1
    assert "stale     models/cable_sag_grad.py" in result.err.splitlines()
    assert generations == ["models/cable_sag.py"]


def test_a_source_changed_and_back_is_current(
    built: Path, generations: list[str]
) -> None:
    model = built / "models/cable_sag.py"
    text = model.read_text()
    model.write_text(text + "\n")
    model.write_text(text)  # same bytes, newer mtime: hashes, not times, decide
    assert cli("build", "--check", "-j", "1", cwd=built).code == 0
    assert generations == []


def test_an_edited_output_is_reported_as_edited_and_kept(
    built: Path, generations: list[str]
) -> None:
    out = built / "models/fuel_hedge_grad.py"
    edited = out.read_text().replace(
        "    return value,", "    value += 0.0\n    return value,"
    )
    out.write_text(edited)
    check = cli("build", "--check", "-j", "1", cwd=built)
    assert check.code == 1
    assert "edited    models/fuel_hedge_grad.py" in check.err.splitlines()
    assert "build --check: 3 targets: 1 edited, 2 unchanged" in check.err
    assert "changed by hand" in check.err
    assert generations == ["models/fuel_hedge.py"]  # compared in full first
    refused = cli("build", "-j", "1", cwd=built)
    assert refused.code == 2
    assert "edited by hand" in refused.err and "--force" in refused.err
    assert out.read_text() == edited  # not silently regenerated
    gen = cli("gen", "models/fuel_hedge.py", "call_value", "--wrt", "spot,vol",
              "-o", "models/fuel_hedge_grad.py", "--check", cwd=built)  # fmt: skip
    assert gen.code == 1 and "edited    models/fuel_hedge_grad.py" in gen.err
    assert cli("build", "--force", "-j", "1", cwd=built).code == 0
    assert cli("build", "--check", cwd=built).code == 0


def test_an_output_regenerated_identically_by_hand_is_current(built: Path) -> None:
    # edited, then the edit undone: the bytes are what generating writes
    out = built / OUT
    text = out.read_text()
    out.write_text(text + "# note\n")
    out.write_text(text)
    assert cli("build", "--check", cwd=built).code == 0


def test_a_changed_option_falls_back_and_is_stale(
    built: Path, generations: list[str]
) -> None:
    pyproject = built / "pyproject.toml"
    pyproject.write_text(
        pyproject.read_text().replace('wrt = ["spot", "vol"]', 'wrt = ["spot"]')
    )
    result = cli("build", "--check", "-j", "1", cwd=built)
    assert result.code == 1
    assert "stale     models/fuel_hedge_grad.py" in result.err.splitlines()
    assert generations == ["models/fuel_hedge.py"]
    # and on the command line: another --wrt, another --target
    gen = ("gen", "models/thermistor.py", "fit_loss", "-o", OUT, "--check")
    assert cli(*gen, "--wrt", "a,b", cwd=built).code == 1
    assert cli(*gen, "--wrt", "a,b,c", "--target", "micropython", cwd=built).code == 1
    assert cli(*gen, "--wrt", "a,b,c", cwd=built).code == 0


def test_another_version_falls_back_and_is_stale(
    built: Path, generations: list[str]
) -> None:
    out = built / OUT
    version = f"gradwright {gradwright.__version__}."
    out.write_text(_restamp(out.read_text(), version, "gradwright 0.0.1."))
    result = cli("build", "--check", "-j", "1", cwd=built)
    assert result.code == 1
    assert f"stale     {OUT}" in result.err.splitlines()  # not "edited"
    assert generations == ["models/thermistor.py"]


def test_a_header_without_a_digest_falls_back_and_is_stale(
    built: Path, generations: list[str]
) -> None:
    from gradwright.header import DIGEST_PREFIX

    out = built / OUT
    lines = out.read_text().splitlines(keepends=True)
    out.write_text("".join(x for x in lines if not x.startswith(DIGEST_PREFIX)))
    result = cli("build", "--check", "-j", "1", cwd=built)
    assert result.code == 1
    assert f"stale     {OUT}" in result.err.splitlines()
    assert generations == ["models/thermistor.py"]
    assert cli("build", "-j", "1", cwd=built).code == 0  # not refused: not edited


def test_a_changed_emitted_test_option_is_stale(tmp_path: Path) -> None:
    root = project(
        tmp_path,
        target(
            "models/thermistor.py", ["fit_loss"], OUT, wrt=["a", "b", "c"],
            emit_test='"tests/test_t.py"', ranges="{ " + THERMISTOR_RANGES + " }",
        ),
    )  # fmt: skip
    assert cli("build", cwd=root).code == 0
    assert cli("build", "--check", cwd=root).code == 0
    pyproject = root / "pyproject.toml"
    pyproject.write_text(
        pyproject.read_text().replace("kelvin = [250", "kelvin = [260")
    )
    result = cli("build", "--check", cwd=root)
    assert result.code == 1 and "stale     tests/test_t.py" in result.err


def test_build_jobs_keep_target_order_and_the_other_targets(proj: Path) -> None:
    serial = cli("build", "--check", "-j", "1", cwd=proj)
    parallel = cli("build", "--check", "-j", "4", cwd=proj)
    assert serial.code == parallel.code == 2
    assert serial.err == parallel.err
    assert parallel.err.count("missing   ") == 3  # the broken one did not stop them
    assert cli("build", "-j", "0", cwd=proj).code == 2


def _modules_loaded(args: list[str], cwd: Path) -> tuple[int, list[str]]:
    """Run the command line in a fresh interpreter; which heavy modules it loaded."""
    code = (
        "import sys\n"
        "from gradwright.workflow.cli import main\n"
        "try:\n"
        f"    status = main({args!r})\n"
        "except SystemExit as stop:\n"
        "    status = stop.code\n"
        f"print(status, *sorted(m for m in {HEAVY!r} if m in sys.modules))\n"
    )
    done = subprocess.run(
        [sys.executable, "-c", code], cwd=cwd, capture_output=True, text=True
    )
    words = done.stdout.splitlines()[-1].split()  # after what the command printed
    return int(words[0]), words[1:]


def test_version_help_and_a_current_check_load_no_generator(built: Path) -> None:
    assert _modules_loaded(["--version"], built) == (0, [])
    assert _modules_loaded(["--help"], built) == (0, [])
    assert _modules_loaded(["build", "--help"], built) == (0, [])
    assert _modules_loaded(["build", "--check"], built) == (0, [])
    gen = [*GEN, "-o", OUT, "--check"]
    assert _modules_loaded(gen, built) == (0, [])
    # the same check on a stale output does load them (so the test can fail)
    (built / OUT).write_text((built / OUT).read_text() + "\n")
    status, loaded = _modules_loaded(gen, built)
    assert status == 1 and "libcst" in loaded


def test_emitted_test_draws_lists_and_trip_counts(tmp_path: Path) -> None:
    shutil.copy(ROOT / "samples/kiln_cooling.py", tmp_path / "kiln.py")
    gen = ("gen", "kiln.py", "kiln_loss", "--wrt", "k_conv,k_rad,start_temp")
    result = cli(*gen, "-o", "k_grad.py", "--emit-test", "test_kiln.py", cwd=tmp_path)
    assert result.code == 0, result.err
    text = (tmp_path / "test_kiln.py").read_text()
    assert re.search(r'"readings": \[\s*[0-9.]+,\s*[0-9.]+,\s*[0-9.]+,?\s*\]', text)
    assert re.search(r'"steps_per_reading": [1-4],', text)
    run = _run_pytest(tmp_path, "test_kiln.py")
    assert run.returncode == 0, run.stdout + run.stderr
    assert "3 passed" in run.stdout


HORNER = """
def horner(coeffs, x):
    total = 0.0
    for c in coeffs:
        total = total * x + c
    return total
"""

MIXTURE = """
import numpy as np


def mixture_nll(mu, log_sigma, x):
    sigma = np.exp(log_sigma)
    z1 = (x - mu[0]) / sigma[0]
    z2 = (x - mu[1]) / sigma[1]
    p1 = 0.3 * np.exp(-0.5 * z1 * z1) / sigma[0]
    p2 = 0.7 * np.exp(-0.5 * z2 * z2) / sigma[1]
    return -np.mean(np.log(p1 + p2))
"""


def _break_line(path: Path, pattern: str) -> None:
    """Scale the right-hand side of the one line matching pattern by 2."""
    text, count = re.subn(
        rf"^(\s+{pattern} )(.*)$", r"\1 2.0 * (\2)", path.read_text(), flags=re.M
    )
    assert count == 1
    path.write_text(text)


def test_emitted_test_checks_each_element_of_a_list_parameter(tmp_path: Path) -> None:
    (tmp_path / "h.py").write_text(HORNER)
    gen = ("gen", "h.py", "horner", "-o", "h_grad.py", "--emit-test", "test_h.py")
    assert cli(*gen, cwd=tmp_path).code == 0
    run = _run_pytest(tmp_path, "test_h.py")
    assert run.returncode == 0, run.stdout + run.stderr
    # the list's adjoint is checked element by element: break it and the test fails
    _break_line(tmp_path / "h_grad.py", r"coeffs_bar\[\w+\] \+=")
    broken = _run_pytest(tmp_path, "test_h.py")
    assert broken.returncode == 1 and "3 failed" in broken.stdout, broken.stdout


def test_emitted_test_draws_arrays_of_the_declared_shapes(tmp_path: Path) -> None:
    (tmp_path / "m.py").write_text(MIXTURE)
    gen = ("gen", "m.py", "mixture_nll", "--wrt", "mu,log_sigma", "-o", "m_grad.py")
    emit = ("--emit-test", "test_m.py")
    # an array's shape cannot be known without running the model: an error, and
    # nothing written
    refused = cli(*gen, *emit, cwd=tmp_path)
    assert refused.code == 2
    assert "--shape mu=DIMS" in refused.err
    assert (
        not (tmp_path / "m_grad.py").exists() and not (tmp_path / "test_m.py").exists()
    )
    shapes = ("--shape", "mu=2", "--shape", "log_sigma=2", "--shape", "x=n")
    assert cli(*gen, *emit, *shapes, cwd=tmp_path).code == 0
    text = (tmp_path / "test_m.py").read_text()
    assert "import numpy as np" in text and '"x": np.array([' in text
    run = _run_pytest(tmp_path, "test_m.py")
    assert run.returncode == 0, run.stdout + run.stderr
    _break_line(tmp_path / "m_grad.py", "log_sigma_bar =")
    broken = _run_pytest(tmp_path, "test_m.py")
    assert broken.returncode == 1 and "3 failed" in broken.stdout, broken.stdout


def test_a_pipe_as_output_is_written_to_not_replaced(proj: Path) -> None:
    # like -o /dev/null: renaming a file over it would replace the device
    import threading

    pipe = proj / "pipe"
    os.mkfifo(pipe)
    received: list[bytes] = []
    reader = threading.Thread(target=lambda: received.append(pipe.read_bytes()))
    reader.start()
    result = cli(*GEN, "-o", "pipe", cwd=proj)
    reader.join(timeout=60)
    assert result.code == 0, result.err
    assert stat.S_ISFIFO(pipe.stat().st_mode)  # still the pipe
    assert received and received[0].startswith(b"# Generated by gradwright")


def test_force_regenerates_an_output_whose_header_looks_current(tmp_path: Path) -> None:
    """An output left by an older generator of the same version (a developer's
    tree) has a consistent header; --force must still regenerate it."""
    from gradwright.header import stamp

    (tmp_path / "m.py").write_text("def f(x):\n    return x * x\n")
    assert cli("gen", "m.py", "f", "-o", "out.py", cwd=tmp_path).code == 0
    fresh = (tmp_path / "out.py").read_text()
    lines = [
        line for line in fresh.splitlines(keepends=True) if "output sha256" not in line
    ]
    older = stamp("".join(lines).replace("x_bar = 2.0 * x", "x_bar = x + x"))
    assert older != fresh
    (tmp_path / "out.py").write_text(older)
    assert cli("gen", "m.py", "f", "-o", "out.py", cwd=tmp_path).code == 0
    assert (tmp_path / "out.py").read_text() == older  # the fast path trusts it
    assert cli("gen", "m.py", "f", "-o", "out.py", "--force", cwd=tmp_path).code == 0
    assert (tmp_path / "out.py").read_text() == fresh
