"""The package's plan: one package per stage of the data flow, imports only downward, no loops.

Outside reference: import-linter (its `layers` and `acyclic_siblings` contracts in
pyproject.toml, read and checked by its own `lint-imports` command), run on the
package as it is and on copies with one planted upward import or loop, which it
must refuse by name. The size aims (modules < 500 lines, functions < 80) are the
project's own rule, measured with Python's ast module.
"""

import ast
import os
import shutil
import subprocess
import sys
from pathlib import Path

import pytest

REPOSITORY = Path(__file__).resolve().parents[1]
LINT_IMPORTS = Path(sys.executable).parent / "lint-imports"
#: The stated exception to the 80-line aim: the exact engine's per-cell walk (DEVELOPERS.md: splitting it
#: into helpers that take arrays cost 1.6x in speed).
LONG_FUNCTIONS = {("raytrace/kernels/crossings.py", "walk_segment")}


def lint(root):
    """lint-imports on the package under ``root`` with the repository's contracts: (exit code, output)."""
    if not LINT_IMPORTS.exists():
        pytest.skip("import-linter is not installed (the test extra installs it)")
    environment = dict(os.environ, PYTHONPATH=str(root))
    done = subprocess.run([str(LINT_IMPORTS), "--no-cache", "--config", str(root / "pyproject.toml")], cwd=root,
                          env=environment, capture_output=True, text=True, timeout=300)
    return done.returncode, done.stdout + done.stderr


def planted_copy(tmp_path, module, line):
    """A copy of the package and its contracts with ``line`` appended to ``module`` (a path in the package)."""
    shutil.copytree(REPOSITORY / "raytrace", tmp_path / "raytrace",
                    ignore=shutil.ignore_patterns("__pycache__", "*.nbi", "*.nbc"))
    shutil.copy(REPOSITORY / "pyproject.toml", tmp_path / "pyproject.toml")
    with open(tmp_path / "raytrace" / module, "a") as handle:
        handle.write(f"\n{line}\n")
    return tmp_path


def test_the_package_keeps_its_layers_and_has_no_import_loops():
    code, output = lint(REPOSITORY)
    assert code == 0, output
    assert "2 kept, 0 broken" in output, output


def test_an_upward_import_breaks_the_layers_contract_naming_both_modules(tmp_path):
    # core is the lowest layer; the command line the highest.
    code, output = lint(planted_copy(tmp_path, "core/errors.py", "from raytrace.cli import runfile  # planted"))
    assert code != 0
    assert "Data flow: each stage imports only the stages below it BROKEN" in output, output
    assert "raytrace.core.errors -> raytrace.cli.runfile" in output, output


def test_an_import_loop_inside_a_package_breaks_the_loop_contract(tmp_path):
    # box.py imports arrays.py, which imports values.py: values importing box closes a loop.
    code, output = lint(planted_copy(tmp_path, "boxes/values.py", "from raytrace.boxes import box  # planted"))
    assert code != 0
    assert "No import loops between the modules of any package BROKEN" in output, output
    assert "No cycles are allowed in raytrace.boxes" in output, output


def test_modules_and_functions_keep_the_size_aims():
    too_long = []
    for path in sorted((REPOSITORY / "raytrace").rglob("*.py")):
        name = path.relative_to(REPOSITORY).as_posix()
        source = path.read_text()
        if source.count("\n") > 500:
            too_long.append(f"{name}: {source.count(chr(10))} lines")
        for node in ast.walk(ast.parse(source)):
            if isinstance(node, (ast.FunctionDef, ast.AsyncFunctionDef)):
                length = node.end_lineno - node.lineno + 1
                if length > 80 and (name, node.name) not in LONG_FUNCTIONS:
                    too_long.append(f"{name}:{node.lineno} {node.name}: {length} lines")
    assert not too_long, "over the size aims (500 lines a module, 80 a function):\n" + "\n".join(too_long)
