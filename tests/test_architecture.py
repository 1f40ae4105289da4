"""The architecture, enforced: only the command-line modules print or exit; stages do not import the CLI."""

import ast
from pathlib import Path

PKG = Path(__file__).resolve().parent.parent / "metalay"


def _calls(tree, name):
    return [n for n in ast.walk(tree) if isinstance(n, ast.Call) and (
        (isinstance(n.func, ast.Name) and n.func.id == name)
        or (isinstance(n.func, ast.Attribute) and n.func.attr == name and isinstance(n.func.value, ast.Name)
            and n.func.value.id == "sys"))]


def test_only_cli_modules_print_or_exit():
    # Common practice (no source): library functions return data; the command line talks to the user
    offenders = []
    for path in sorted(PKG.rglob("*.py")):
        if path.relative_to(PKG).parts[0] == "cli":
            continue
        tree = ast.parse(path.read_text())
        if _calls(tree, "print") or _calls(tree, "exit"):
            offenders.append(path.name)
    assert offenders == []


def test_stages_do_not_import_the_cli():
    offenders = []
    for path in sorted(PKG.rglob("*.py")):
        if path.relative_to(PKG).parts[0] == "cli":
            continue
        for node in ast.walk(ast.parse(path.read_text())):
            if isinstance(node, ast.ImportFrom) and node.module and "cli" in node.module.split("."):
                offenders.append(path.name)
    assert offenders == []


def test_every_module_declares_its_public_names():
    missing = [p.name for p in sorted(PKG.rglob("*.py"))
               if p.name not in ("__init__.py", "__main__.py") and "__all__" not in p.read_text()]
    assert missing == []
