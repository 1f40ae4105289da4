"""The architecture, enforced: subpackages by stage, one direction of imports, only the CLI prints or exits,
explicit public names, a lint that CI runs, and the README's Python snippet working.

Common practice (no source): library functions return data and raise errors; the command line talks to the user.
"""

import ast
import importlib
import os
import re
import subprocess
import sys
from pathlib import Path

import pytest

from conftest import SMALL_DESIGN, write_toml

ROOT = Path(__file__).resolve().parent.parent
PKG = ROOT / "metalay"
SUBPACKAGES = ("util", "design", "cells", "io", "mask", "checks", "routes", "studies", "cli")


def _modules():
    """(dotted module name, path) of every module of the package."""
    for path in sorted(PKG.rglob("*.py")):
        parts = list(path.relative_to(ROOT).with_suffix("").parts)
        if parts[-1] == "__init__":
            parts = parts[:-1]
        yield ".".join(parts), path


def _imports(module: str, path: Path) -> set[str]:
    """Every module ``module`` imports, absolute, with ``from X import y`` counted as X and X.y (y may be a module).

    Relative imports are resolved against the module's package; imports inside functions count too.
    """
    package = module if path.name == "__init__.py" else module.rsplit(".", 1)[0]
    out = set()
    for node in ast.walk(ast.parse(path.read_text())):
        if isinstance(node, ast.Import):
            out.update(alias.name for alias in node.names)
        elif isinstance(node, ast.ImportFrom):
            if node.level:
                base = package.split(".")
                base = base[:len(base) - node.level + 1]
                target = ".".join(base + ([node.module] if node.module else []))
            else:
                target = node.module or ""
            out.add(target)
            out.update(f"{target}.{alias.name}" for alias in node.names)
        elif (isinstance(node, ast.Call) and isinstance(node.func, ast.Attribute)
              and node.func.attr == "import_module" and node.args and isinstance(node.args[0], ast.Constant)):
            out.add(str(node.args[0].value))
    return out


def _within(name: str, package: str) -> bool:
    return name == package or name.startswith(package + ".")


def _calls(tree, name):
    return [n for n in ast.walk(tree) if isinstance(n, ast.Call) and (
        (isinstance(n.func, ast.Name) and n.func.id == name)
        or (isinstance(n.func, ast.Attribute) and n.func.attr == name and isinstance(n.func.value, ast.Name)
            and n.func.value.id in ("sys", "os")))]


def test_only_cli_modules_print_or_exit():
    offenders = []
    for module, path in _modules():
        if _within(module, "metalay.cli"):
            continue
        tree = ast.parse(path.read_text())
        if _calls(tree, "print") or _calls(tree, "exit") or _calls(tree, "_exit") or _calls(tree, "quit"):
            offenders.append(module)
    assert offenders == []


def test_library_code_never_imports_the_cli():
    offenders = sorted((module, name) for module, path in _modules() if not _within(module, "metalay.cli")
                       for name in _imports(module, path) if _within(name, "metalay.cli"))
    assert offenders == []


def test_the_import_rule_catches_every_form_of_a_cli_import(tmp_path):
    # the check above must not be blind to relative forms or string imports
    forms = ["from metalay.cli import main", "import metalay.cli.rules", "from metalay import cli",
             "from ..cli import rules", "from .. import cli", "importlib.import_module('metalay.cli.study')"]
    for code in forms:
        path = tmp_path / "mod.py"
        path.write_text(code + "\n")
        assert any(_within(n, "metalay.cli") for n in _imports("metalay.checks.mod", path)), code


def test_one_direction_checks_never_import_compile_and_mask_never_imports_checks():
    # compile receives the checks it runs as steps (metalay.checks.steps.default_checks); the checks may use
    # mask stages (process) but never the compile
    offenders = []
    for module, path in _modules():
        names = _imports(module, path)
        if _within(module, "metalay.checks"):
            offenders += [(module, n) for n in names if _within(n, "metalay.mask.compile")]
        if _within(module, "metalay.mask"):
            offenders += [(module, n) for n in names if _within(n, "metalay.checks")]
        if not _within(module, "metalay.cli") and module != "metalay.api":
            offenders += [(module, n) for n in names if n == "metalay.api"]
    assert offenders == []


def test_private_modules_and_names_stay_inside_their_package():
    # helpers used only inside a package are _-prefixed; nobody outside it imports them (metalay.util is the
    # shared helper package: its _memory and _lazy serve every stage)
    offenders = []
    for module, path in _modules():
        pkg = ".".join(module.split(".")[:2])
        for name in _imports(module, path):
            parts = name.split(".")
            private = [i for i, p in enumerate(parts) if p.startswith("_") and not p.startswith("__")]
            if not private or not _within(name, "metalay"):
                continue
            owner = ".".join(parts[:2]) if private[0] >= 2 else "metalay"
            if owner != pkg and owner != "metalay.util":
                offenders.append((module, name))
    assert offenders == []


def test_subpackages_have_a_map_and_explicit_public_names():
    for sub in SUBPACKAGES:
        pkg = importlib.import_module(f"metalay.{sub}")
        assert pkg.__doc__ and "module" in pkg.__doc__, sub
        assert isinstance(pkg.__all__, (list, tuple)) and pkg.__all__, sub
        for name in pkg.__all__:
            assert getattr(pkg, name) is not None, f"metalay.{sub}.{name}"


def test_every_module_declares_its_public_names():
    missing = [module for module, path in _modules()
               if path.name not in ("__init__.py", "__main__.py") and "__all__" not in path.read_text()]
    assert missing == []


def test_every_error_class_lives_in_errors_py():
    # one exception root: every exception class of the package is defined in metalay/errors.py
    offenders = []
    for module, path in _modules():
        if module == "metalay.errors":
            continue
        for node in ast.walk(ast.parse(path.read_text())):
            if isinstance(node, ast.ClassDef) and (node.name.endswith("Error") or any(
                    isinstance(b, ast.Name) and b.id.endswith(("Error", "Exception")) for b in node.bases)):
                offenders.append((module, node.name))
    assert offenders == []


MAX_FUNCTION_LINES = 80  # Common practice (no source): a function a reader can hold at once; issue 14 sets about 80


def _function_lengths(source: str):
    """(name, first line, body lines) of every function: the body from its first statement after any docstring."""
    for node in ast.walk(ast.parse(source)):
        if isinstance(node, (ast.FunctionDef, ast.AsyncFunctionDef)):
            body = node.body
            first = body[0]
            if (len(body) > 1 and isinstance(first, ast.Expr) and isinstance(first.value, ast.Constant)
                    and isinstance(first.value.value, str)):
                first = body[1]
            yield node.name, node.lineno, node.end_lineno - first.lineno + 1


def test_no_function_runs_over_eighty_lines():
    long = [f"{path.relative_to(ROOT)}:{line} {name} ({n} lines)"
            for _, path in _modules() for name, line, n in _function_lengths(path.read_text())
            if n > MAX_FUNCTION_LINES]
    assert not long, "split these into named stages: " + "; ".join(long)


def test_the_length_rule_measures_bodies_without_docstrings():
    body = "\n".join(f"    x{i} = {i}" for i in range(MAX_FUNCTION_LINES + 1))
    doc = '    """' + "\n".join(["A docstring."] * 30) + '"""\n'
    lengths = {name: n for name, _, n in _function_lengths(f"def long():\n{body}\n\ndef short():\n{doc}    return 1\n")}
    assert lengths == {"long": MAX_FUNCTION_LINES + 1, "short": 1}


def test_ruff_finds_nothing():
    # the lint CI runs (rule set in pyproject.toml); ruff is a test dependency, so a missing one fails
    proc = subprocess.run([sys.executable, "-m", "ruff", "check", "metalay", "tests", "bench"], cwd=ROOT,
                          capture_output=True, text=True, timeout=300)
    assert proc.returncode == 0, proc.stdout + proc.stderr


@pytest.mark.filterwarnings("ignore::DeprecationWarning")
def test_readme_python_snippet_runs(tmp_path, monkeypatch):
    snippet = re.search(r"```python\n(.*?)```", (ROOT / "README.md").read_text(), re.S).group(1)
    data = dict(SMALL_DESIGN)
    data["checks"] = {"rules": True, "optics": False}
    write_toml(tmp_path / "my_design.toml", data)
    monkeypatch.chdir(tmp_path)
    env = dict(os.environ, PYTHONPATH=str(ROOT))
    proc = subprocess.run([sys.executable, "-c", snippet], cwd=tmp_path, capture_output=True, text=True, env=env,
                          timeout=300)
    assert proc.returncode == 0, proc.stderr
    assert "rules check: PASS (clean)" in proc.stdout and "verdict: PASS" in proc.stdout
    assert (tmp_path / "out" / "my_design" / "manifest.json").is_file()
