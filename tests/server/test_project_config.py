"""Project configuration (docs/project.md): where it is found, what it holds, and how a
malformed file is reported (file and key named)."""

from pathlib import Path

import pytest

from latchwatch.analyzers.model.findings import Severity
from latchwatch.server.config.project import (
    ConfigError,
    ProjectConfig,
    SweepSpec,
    expand_includes,
    find_project_config,
    load_project_config,
)

KNOWN = {"tap-distance", "tap-supply", "shunt-resistance", "floating-well"}

# The example of docs/project.md, verbatim.
CONTRACT_EXAMPLE = """
[tool.latchwatch]
tech = "demo"                 # or a path relative to this file
include = ["cells/**/*.py"]
exclude = ["cells/scratch/*"]
python = ".venv/bin/python"
timeout = 10
disable = ["tap-supply"]
severity = { shunt-resistance = "info" }

[[tool.latchwatch.sweep]]     # parameter corners of a generator function
script = "cells/fingers.py"
function = "finger_array"     # returns a gdstk.Cell or gdstk.Library
params = { fingers = [1, 4, 16], w = [0.5, 5.0] }   # the full grid is run
"""


def write(path: Path, text: str) -> Path:
    path.parent.mkdir(parents=True, exist_ok=True)
    path.write_text(text)
    return path


def load_error(path, known=None) -> ConfigError:
    with pytest.raises(ConfigError) as caught:
        load_project_config(path, known)
    return caught.value


def test_design_example_loads(tmp_path):
    source = write(tmp_path / "pyproject.toml", CONTRACT_EXAMPLE)
    config = load_project_config(source, KNOWN)
    root = tmp_path
    assert config == ProjectConfig(
        root=tmp_path,
        source=source,
        tech="demo",
        include=("cells/**/*.py",),
        exclude=("cells/scratch/*",),
        python=str(root / ".venv" / "bin" / "python"),
        timeout=10.0,
        disable=("tap-supply",),
        severity={"shunt-resistance": Severity.INFO},
        sweeps=(SweepSpec(str(root / "cells" / "fingers.py"), "finger_array",
                          {"fingers": [1, 4, 16], "w": [0.5, 5.0]}),),
    )


def test_tech_path_resolves_against_the_file_and_names_stay(tmp_path):
    source = write(tmp_path / "latchwatch.toml", 'tech = "tech/house.toml"\npython = "python3"\n')
    config = load_project_config(source)
    assert config.tech == str(tmp_path / "tech" / "house.toml")
    assert config.python == "python3"  # a bare name is looked up on PATH, not resolved


def test_found_by_walking_up_from_a_script(tmp_path):
    write(tmp_path / "pyproject.toml", CONTRACT_EXAMPLE)
    script = write(tmp_path / "cells" / "deep" / "row.py", "")
    config = find_project_config(script, KNOWN)
    assert config.source == tmp_path / "pyproject.toml" and config.root == tmp_path
    assert find_project_config(script.parent).source == config.source  # a folder works too


def test_pyproject_without_table_is_passed_by(tmp_path):
    write(tmp_path / "latchwatch.toml", 'tech = "demo"\n')
    write(tmp_path / "sub" / "pyproject.toml", '[project]\nname = "x"\n')
    config = find_project_config(tmp_path / "sub" / "gen.py")
    assert config.source == tmp_path / "latchwatch.toml"
    assert config.tech == "demo"


def test_nearest_file_wins(tmp_path):
    write(tmp_path / "latchwatch.toml", 'tech = "outer"\n')
    write(tmp_path / "sub" / "latchwatch.toml", 'tech = "inner"\n')
    assert find_project_config(tmp_path / "sub" / "gen.py").tech == "inner"


def test_both_files_in_one_folder_is_an_error(tmp_path):
    write(tmp_path / "pyproject.toml", '[tool.latchwatch]\ntech = "demo"\n')
    write(tmp_path / "latchwatch.toml", 'tech = "demo"\n')
    with pytest.raises(ConfigError, match="keep one of the two"):
        find_project_config(tmp_path / "gen.py")


def test_nothing_found_gives_the_empty_config(tmp_path):
    above = [p for p in tmp_path.parents if (p / "pyproject.toml").exists() or (p / "latchwatch.toml").exists()]
    if above:
        pytest.skip(f"a project file above the temporary folder ({above[0]}) would be found")
    config = find_project_config(tmp_path / "gen.py")
    assert config == ProjectConfig()
    assert config.root is None and config.severity == {} and expand_includes(config) == []


def test_binary_project_file_is_a_config_error(tmp_path):
    source = tmp_path / "latchwatch.toml"
    source.write_bytes(b"tech = \xff\n")
    message = str(load_error(source))
    assert message == f"{source}: not valid TOML: not UTF-8 text (byte 0xff at offset 7)"


def test_invalid_toml_names_the_file_and_line(tmp_path):
    source = write(tmp_path / "latchwatch.toml", 'tech = "demo"\ntimeout = = 3\n')
    message = str(load_error(source))
    assert message.startswith(f"{source}: not valid TOML") and "line 2" in message


@pytest.mark.parametrize("text, key, expected", [
    ("timeout = '10'", "timeout", "expected a positive number of seconds, got '10'"),
    ("timeout = -1", "timeout", "expected a positive number of seconds, got -1"),
    ("timeout = true", "timeout", "expected a positive number of seconds, got True"),
    ("tech = 3", "tech", "expected a non-empty string, got 3"),
    ("include = 'cells/*.py'", "include", "expected a list of non-empty strings, got 'cells/*.py'"),
    ("include = ['/abs/*.py']", "include", "expected glob patterns inside the configuration file's folder"),
    ("exclude = ['../x/*']", "exclude", "expected glob patterns inside the configuration file's folder"),
    ("disable = 'tap-supply'", "disable", "expected a list of non-empty strings"),
    ("severity = 'info'", "severity", "expected a table of rule = severity, got 'info'"),
    ("severity = { tap-supply = 'loud' }", "severity.tap-supply", "expected one of error, warning, info, got 'loud'"),
    ("require-sandbox = 'yes'", "require-sandbox", "expected true or false, got 'yes'"),
])
def test_wrong_values_name_file_key_and_expectation(tmp_path, text, key, expected):
    source = write(tmp_path / "pyproject.toml", f"[tool.latchwatch]\n{text}\n")
    error = load_error(source, KNOWN)
    assert str(error).startswith(f"{source}: tool.latchwatch.{key}: {expected}")
    assert error.file == source and error.key == f"tool.latchwatch.{key}"


@pytest.mark.parametrize("value, required", [("true", True), ("false", False), (None, False)])
def test_require_sandbox_key(tmp_path, value, required):
    text = 'tech = "demo"\n' + (f"require-sandbox = {value}\n" if value else "")
    source = write(tmp_path / "latchwatch.toml", text)
    assert load_project_config(source).require_sandbox is required


def test_latchwatch_toml_keys_are_named_without_prefix(tmp_path):
    source = write(tmp_path / "latchwatch.toml", "timeout = 'slow'\n")
    assert str(load_error(source)) == (
        f"{source}: timeout: expected a positive number of seconds, got 'slow'")


def test_unknown_key_suggests_the_close_one(tmp_path):
    source = write(tmp_path / "latchwatch.toml", "timout = 3\n")
    assert str(load_error(source)) == f"{source}: timout: unknown key; did you mean 'timeout'?"
    source = write(tmp_path / "pyproject.toml", "[[tool.latchwatch.sweeps]]\nscript = 'a.py'\n")
    assert "tool.latchwatch.sweeps: unknown key; did you mean 'sweep'?" in str(load_error(source))


def test_unknown_rule_ids_are_errors_when_rules_are_known(tmp_path):
    source = write(tmp_path / "latchwatch.toml", "disable = ['tap-distanse']\n")
    assert str(load_error(source, KNOWN)) == (
        f"{source}: disable: unknown rule 'tap-distanse'; did you mean 'tap-distance'?")
    assert load_project_config(source).disable == ("tap-distanse",)  # checked later by the caller
    source = write(tmp_path / "latchwatch.toml", "severity = { made-up = 'info' }\n")
    assert "severity.made-up: unknown rule 'made-up'" in str(load_error(source, KNOWN))


@pytest.mark.parametrize("key", ["trusted", "trust", "trust_folders"])
def test_no_key_grants_trust(tmp_path, key):
    source = write(tmp_path / "pyproject.toml", f"[tool.latchwatch]\n{key} = true\n")
    message = str(load_error(source))
    assert message.startswith(f"{source}: tool.latchwatch.{key}: a project file cannot grant trust")
    assert "latchwatch trust" in message and "editor setting" in message


def test_wrapper_table_in_latchwatch_toml_is_an_error(tmp_path):
    source = write(tmp_path / "latchwatch.toml", "[tool.latchwatch]\ntech = 'demo'\n")
    assert "write the keys at the top level" in str(load_error(source))


def test_pyproject_without_table_loaded_directly_is_an_error(tmp_path):
    source = write(tmp_path / "pyproject.toml", "[project]\nname = 'x'\n")
    assert str(load_error(source)) == f"{source}: has no [tool.latchwatch] table"


@pytest.mark.parametrize("sweep, key, expected", [
    ("script = 'a.py'\nfunction = 'f'", "sweep[1].params", "missing"),
    ("script = 'a.py'\nfunction = 'f'\nparams = { n = 3 }", "sweep[1].params.n",
     "expected a non-empty list of values, got 3"),
    ("script = 'a.py'\nfunction = 'f'\nparams = { n = [] }", "sweep[1].params.n",
     "expected a non-empty list of values, got []"),
    ("script = 'a.py'\nfunction = 'not a name'\nparams = { n = [1] }", "sweep[1].function",
     "expected the name of a function in the script"),
    ("script = 'a.py'\nfunction = 'f'\nparams = { n = [1] }\nparam = 1", "sweep[1].param",
     "unknown key; did you mean 'params'?"),
])
def test_malformed_sweeps(tmp_path, sweep, key, expected):
    source = write(tmp_path / "latchwatch.toml", f"[[sweep]]\n{sweep}\n")
    assert str(load_error(source)).startswith(f"{source}: {key}: {expected}")


def test_second_sweep_is_numbered(tmp_path):
    source = write(tmp_path / "latchwatch.toml",
                   "[[sweep]]\nscript = 'a.py'\nfunction = 'f'\nparams = { n = [1, 2] }\n"
                   "[[sweep]]\nscript = 'b.py'\nfunction = 'g'\n")
    assert str(load_error(source)).startswith(f"{source}: sweep[2].params: missing")


def test_expand_includes_globs_recursively_minus_excludes(tmp_path):
    for name in ["cells/a.py", "cells/sub/b.py", "cells/scratch/c.py", "cells/scratch/deep/d.py",
                 "cells/notes.txt", "top.py", "cells/.venv/lib/e.py", "cells/__pycache__/f.py"]:
        write(tmp_path / name, "")
    config = ProjectConfig(root=tmp_path, include=("cells/**/*.py", "top.py"), exclude=("cells/scratch/*",))
    assert expand_includes(config) == [tmp_path / "cells" / "a.py", tmp_path / "cells" / "sub" / "b.py",
                                       tmp_path / "top.py"]


def test_exclude_patterns_with_double_star_and_classes(tmp_path):
    for name in ["g/a1.py", "g/a2.py", "g/x/test_a.py", "g/x/y/test_b.py"]:
        write(tmp_path / name, "")
    config = ProjectConfig(root=tmp_path, include=("**/*.py",), exclude=("**/test_*.py", "g/a[!1].py"))
    assert expand_includes(config) == [tmp_path / "g" / "a1.py"]


def test_paths_may_point_outside_the_project_folder(tmp_path):
    source = write(tmp_path / "proj" / "latchwatch.toml", 'tech = "../common/house.toml"\n')
    assert load_project_config(source).tech == str(tmp_path / "common" / "house.toml")


def test_include_ending_in_double_star_means_every_file_below(tmp_path):
    for name in ["lib/a.py", "lib/x/b.gds"]:
        write(tmp_path / name, "")
    config = ProjectConfig(root=tmp_path, include=("lib/**",))
    assert expand_includes(config) == [tmp_path / "lib" / "a.py", tmp_path / "lib" / "x" / "b.gds"]


def test_the_command_line_and_the_include_walk_exclude_the_same_files(tmp_path):
    """One matcher: ``*`` stays within a folder name in both (glob semantics), ``**`` spans folders."""
    from latchwatch.server.config.project import expand_includes, is_excluded

    for name in ("gen/a.py", "gen/sub/x.py", "keep/b.py", "deep/one/two/c.py"):
        (tmp_path / name).parent.mkdir(parents=True, exist_ok=True)
        (tmp_path / name).write_text("")
    (tmp_path / "latchwatch.toml").write_text(
        'tech = "demo"\ninclude = ["**/*.py"]\nexclude = ["gen/*.py", "deep/**"]\n')
    config = load_project_config(tmp_path / "latchwatch.toml")
    walked = {p.relative_to(tmp_path).as_posix() for p in expand_includes(config)}
    assert walked == {"gen/sub/x.py", "keep/b.py"}
    for name in ("gen/a.py", "gen/sub/x.py", "keep/b.py", "deep/one/two/c.py"):
        assert is_excluded(config, tmp_path / name) == (name not in walked), name


def test_env_names_the_variables_scripts_see(tmp_path):
    source = write(tmp_path / "latchwatch.toml", 'tech = "demo"\nenv = ["PDK_ROOT", "PDK"]\n')
    assert load_project_config(source).env == ("PDK_ROOT", "PDK")


@pytest.mark.parametrize("value, said", [
    ('["LD_PRELOAD"]', "LD_PRELOAD is not passed into a run"),
    ('["PYTHONPATH"]', "PYTHONPATH is not passed into a run"),
    ('["PDK ROOT"]', "an environment variable name"),
    ('"PDK_ROOT"', "a list of non-empty strings"),
])
def test_env_refuses_what_would_run_before_the_sandbox_and_names_the_key(tmp_path, value, said):
    source = write(tmp_path / "latchwatch.toml", f"env = {value}\n")
    message = str(load_error(source))
    assert message.startswith(f"{source}: env: ") and said in message
