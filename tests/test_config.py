"""``[tool.gradwright]`` in pyproject.toml: the schema, paths, and located errors."""

from __future__ import annotations

import os
from pathlib import Path

import pytest
from workflow_support import CABLE, THERMISTOR, cli, project, target

from gradwright.diagnostics import GradwrightError
from gradwright.workflow import config
from gradwright.workflow.points import Range


def _write(root: Path, body: str) -> Path:
    path = root / "pyproject.toml"
    path.write_text(body, encoding="utf-8")
    return path


def _error(path: Path) -> str:
    with pytest.raises(GradwrightError) as caught:
        config.load_project(path)
    return caught.value.diagnostic.render()


def test_targets_are_read_with_their_options(tmp_path: Path) -> None:
    path = _write(
        tmp_path,
        """
[[tool.gradwright.targets]]
source = "./models/../models/thermistor.py"
functions = ["fit_loss"]
wrt = ["a", "b"]
output = "models/thermistor_grad.py"
emit-test = "tests/test_thermistor_grad.py"
ranges = { a = [0.001, 0.002], c = [-1, 1] }

[[tool.gradwright.targets]]
source = "cable.py"
functions = ["rig_loss", "sag"]
output = "cable_grad.py"
target = "micropython"
""",
    )
    project = config.load_project(path)
    assert project.root == tmp_path.resolve()
    first, second = project.targets
    assert first.source == "models/thermistor.py"  # normalized, POSIX
    assert first.functions == ("fit_loss",)
    assert first.wrt == ("a", "b")
    assert first.emit_test == "tests/test_thermistor_grad.py"
    assert first.ranges == {"a": Range(0.001, 0.002), "c": Range(-1.0, 1.0)}
    assert first.target == "cpython"
    assert second.wrt is None and second.emit_test is None and second.ranges == {}
    assert second.functions == ("rig_loss", "sag")
    assert second.target == "micropython"


def test_an_unknown_key_is_located_by_file_line_and_key(tmp_path: Path) -> None:
    path = _write(
        tmp_path,
        THERMISTOR + "\n" + CABLE.replace('output = "', 'wrtt = ["a"]\noutput = "'),
    )
    message = _error(path)
    lines = message.splitlines()
    assert lines[0] == (
        f"{path}:10:1: error: tool.gradwright.targets[1]: unknown key 'wrtt'"
    )
    assert lines[1] == '    wrtt = ["a"]'
    assert lines[2] == "    ^^^^"
    assert lines[3].startswith("hint: known keys: source, functions, output, wrt")


def test_an_unknown_key_in_the_tool_table(tmp_path: Path) -> None:
    path = _write(tmp_path, "[tool.gradwright]\ntargts = []\n")
    assert _error(path).startswith(
        f"{path}:2:1: error: tool.gradwright: unknown key 'targts'"
    )


@pytest.mark.parametrize(
    ("body", "expected"),
    [
        ('functions = ["f"]\noutput = "o.py"', "missing required key 'source'"),
        ('source = "m.py"\noutput = "o.py"', "missing required key 'functions'"),
        ('source = "m.py"\nfunctions = "f"\noutput = "o.py"', "functions: must be a"),
        ('source = "m.py"\nfunctions = []\noutput = "o.py"', "functions: must be a"),
        (
            'source = "m.py"\nfunctions = ["f"]\nwrt = ["a", "a"]\noutput = "o.py"',
            "wrt: lists a name twice",
        ),
        (
            'source = "m.py"\nfunctions = ["f"]\nwrt = [1]\noutput = "o.py"',
            "wrt: must be a non-empty array of names",
        ),
        ('source = 3\nfunctions = ["f"]\noutput = "o.py"', "source: must be a"),
        (
            'source = "m.py"\nfunctions = ["f"]\noutput = "m.py"',
            "output: is the source file itself",
        ),
        (
            'source = "m.py"\nfunctions = ["f"]\noutput = "o.py"\ntarget = "pypy"',
            "target: must be one of 'cpython', 'micropython', not 'pypy'",
        ),
        (
            'source = "m.py"\nfunctions = ["f"]\noutput = "o.py"\nranges = { a = 1 }',
            "ranges: a: must be [LOW, HIGH]",
        ),
        (
            'source = "m.py"\nfunctions = ["f"]\noutput = "o.py"\n'
            "ranges = { a = [2, 1] }",
            "ranges: a: needs finite LOW < HIGH",
        ),
    ],
)
def test_bad_values_name_the_target_and_key(
    tmp_path: Path, body: str, expected: str
) -> None:
    path = _write(tmp_path, "[[tool.gradwright.targets]]\n" + body + "\n")
    message = _error(path)
    assert message.startswith(f"{path}:")
    assert "error: tool.gradwright.targets[0]" in message
    assert expected in message


@pytest.mark.parametrize(
    ("key", "value"),
    [
        ("source", "../outside.py"),
        ("output", "models/../../outside_grad.py"),
        ("emit-test", "../tests/test_outside.py"),
    ],
)
def test_a_path_outside_the_project_is_an_error(
    tmp_path: Path, key: str, value: str
) -> None:
    root = tmp_path / "proj"
    root.mkdir()
    values = {"source": "m.py", "output": "o.py", "emit-test": "t.py", key: value}
    body = "\n".join(f'{k} = "{v}"' for k, v in values.items())
    path = _write(root, f'[[tool.gradwright.targets]]\nfunctions = ["f"]\n{body}\n')
    message = _error(path)
    assert f"tool.gradwright.targets[0].{key}: '{value}' points outside" in message
    assert f'{key} = "{value}"' in message.splitlines()[1]


def test_absolute_paths_are_refused(tmp_path: Path) -> None:
    inside = tmp_path / "m.py"
    path = _write(
        tmp_path,
        "[[tool.gradwright.targets]]\n"
        f'source = "{inside.as_posix()}"\nfunctions = ["f"]\noutput = "o.py"\n',
    )
    assert "source: " in _error(path) and "is absolute" in _error(path)


def test_a_symlink_leading_out_of_the_project_is_outside(tmp_path: Path) -> None:
    root = tmp_path / "proj"
    root.mkdir()
    (tmp_path / "elsewhere").mkdir()
    os.symlink(tmp_path / "elsewhere", root / "models")
    path = _write(
        root,
        '[[tool.gradwright.targets]]\nsource = "models/m.py"\nfunctions = ["f"]\n'
        'output = "o.py"\n',
    )
    assert "points outside the project folder" in _error(path)


def test_two_targets_writing_one_file(tmp_path: Path) -> None:
    path = _write(tmp_path, THERMISTOR + "\n" + THERMISTOR)
    message = _error(path)
    assert "tool.gradwright.targets[1].output: 'models/thermistor_grad.py' is also" in (
        message
    )
    assert "written by tool.gradwright.targets[0].output" in message


def test_invalid_toml_is_located(tmp_path: Path) -> None:
    path = _write(tmp_path, '[project]\nname = "x"\n\n[tool.gradwright\n')
    message = _error(path)
    assert message.startswith(f"{path}:4:")
    assert "error: invalid TOML" in message


def test_no_table_and_empty_targets(tmp_path: Path) -> None:
    path = _write(tmp_path, '[project]\nname = "x"\n')
    assert "no [tool.gradwright] table" in _error(path)
    path = _write(tmp_path, "[tool.gradwright]\ntargets = []\n")
    message = _error(path)
    assert message.startswith(f"{path}:2:1: error: tool.gradwright.targets must be")


def test_find_pyproject_searches_upwards(tmp_path: Path) -> None:
    path = _write(tmp_path, "")
    deep = tmp_path / "a" / "b"
    deep.mkdir(parents=True)
    found = config.find_pyproject(deep)
    assert found == Path("../../pyproject.toml")
    assert (deep / found).resolve() == path.resolve()


def test_without_tomllib_build_says_what_it_needs(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    monkeypatch.setattr(config, "tomllib", None)  # as on Python 3.10 without tomli
    path = _write(tmp_path, THERMISTOR)
    message = _error(path)
    assert "needs Python 3.11 or newer" in message
    assert "tomli" in message


# ---------------------------------------------------------------------------------
# through the CLI: config errors exit 2, located, without a traceback


def test_build_config_error_exits_two(tmp_path: Path) -> None:
    root = project(tmp_path, target("models/cable_sag.py", ["rig_loss"], "../x.py"))
    result = cli("build", cwd=root)
    assert result.code == 2
    assert result.err.startswith("pyproject.toml:8:1: error: ")
    assert "tool.gradwright.targets[0].output: '../x.py' points outside" in result.err
    assert "Traceback" not in result.err
    assert not (tmp_path.parent / "x.py").exists()


def test_build_with_an_explicit_config(tmp_path: Path) -> None:
    root = project(tmp_path / "proj", CABLE)
    result = cli("build", "--config", "proj/pyproject.toml", cwd=tmp_path)
    assert result.code == 0, result.err
    assert (root / "models/cable_sag_grad.py").is_file()
    missing = cli("build", "--config", "nope.toml", cwd=tmp_path)
    assert missing.code == 2
    assert missing.err.strip() == "error: nope.toml: no such file"


def test_a_missing_source_fails_only_its_target(tmp_path: Path) -> None:
    root = project(
        tmp_path, target("models/gone.py", ["f"], "models/gone_grad.py"), CABLE
    )
    result = cli("build", cwd=root)
    assert result.code == 2
    assert "error: models/gone.py: no such file" in result.err
    assert "generated models/cable_sag_grad.py" in result.err
