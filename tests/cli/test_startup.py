"""Start-up stays light: `import vault`, the CLI module, `--help` and `--version` load no pandas,
scipy or matplotlib (checked in a fresh interpreter's sys.modules; the speed itself is measured
by `mindward bench`, bench/startup.py, never timed here)."""

from __future__ import annotations

import importlib.metadata
import json
import subprocess
import sys

import pytest

from vault.cli.app import BENCH_GROUP, main

HEAVY = ("pandas", "scipy", "matplotlib", "sqlite_utils", "pyarrow", "edfio", "opendp", "fastapi",
         "starlette", "uvicorn", "httpx")


def _loaded_after(code: str) -> list[str]:
    probe = (f"import json, sys\n{code}\n"
             f"print(json.dumps(sorted(m for m in {HEAVY!r} if m in sys.modules)))")
    out = subprocess.run([sys.executable, "-c", probe], capture_output=True, text=True, check=True)
    return json.loads(out.stdout.strip().splitlines()[-1])


@pytest.mark.parametrize("code", [
    "import vault",
    "import vault.cli.app",
    "import vault.errors, vault.cli.render",
    "from vault.cli.app import main\ntry:\n    main(['--help'])\nexcept SystemExit:\n    pass",
    "from vault.cli.app import main\nmain(['--version'])",
    "from vault.cli.app import main\nmain(['audit', '--help'])",
], ids=["import-vault", "import-cli", "errors-render", "help", "version", "group-help"])
def test_start_up_imports_no_heavy_module(code: str) -> None:
    assert _loaded_after(code) == []


def test_the_probe_itself_sees_a_heavy_import() -> None:
    """Guard against a vacuous check: a planted pandas import is seen."""
    assert "pandas" in _loaded_after("import vault\nimport pandas")


def test_import_vault_does_not_load_the_engine() -> None:
    out = subprocess.run([sys.executable, "-c", "import sys, vault; print('vault.api' in sys.modules, "
                          "'pydantic' in sys.modules)"], capture_output=True, text=True, check=True)
    assert out.stdout.split() == ["False", "False"]


def test_version_prints_the_installed_distribution_version(capsys) -> None:
    installed = importlib.metadata.version("mindward")
    assert main(["--version"]) == 0
    assert capsys.readouterr().out.strip() == f"mindward {installed}"
    assert main(["--version", "--json"]) == 0
    assert json.loads(capsys.readouterr().out) == {"name": "mindward", "version": installed}
    assert main(["--json", "--version"]) == 0
    assert json.loads(capsys.readouterr().out)["version"] == installed


def test_version_through_the_parser_gives_the_same_answer(capsys) -> None:
    """The short path in main() and the --version option of the parser agree."""
    assert main(["--version", "info"]) == 0
    assert capsys.readouterr().out.strip() == f"mindward {importlib.metadata.version('mindward')}"


def test_json_before_the_command_is_refused_not_ignored(capsys) -> None:
    assert main(["--json", "info", "--vault", "/nonexistent"]) == 2
    assert json.loads(capsys.readouterr().out)["exit_code"] == 2


def test_bench_says_how_to_install_it_when_the_entry_point_is_missing(capsys, monkeypatch) -> None:
    monkeypatch.setattr("importlib.metadata.entry_points", lambda group: [])
    assert main(["bench", "--quick", "--json"]) == 2
    out, err = capsys.readouterr()
    assert json.loads(out)["exit_code"] == 2
    assert "pip install 'mindward[bench]'" in err and err.count("\n") == 1


def test_bench_says_how_to_install_it_when_its_dependencies_are_missing(capsys, monkeypatch) -> None:
    class Missing:
        name = "bench"

        def load(self) -> None:
            raise ModuleNotFoundError("No module named 'edfio'", name="edfio")

    monkeypatch.setattr("importlib.metadata.entry_points", lambda group: [Missing()])
    assert main(["bench"]) == 2
    err = capsys.readouterr().err
    assert "mindward[bench]" in err and "edfio is missing" in err


def test_the_bench_entry_point_is_registered_in_its_group() -> None:
    found = [ep for ep in importlib.metadata.entry_points(group=BENCH_GROUP) if ep.name == "bench"]
    assert [ep.value for ep in found] == ["mindward_bench.run:command"]
    assert callable(found[0].load())
