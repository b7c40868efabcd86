"""The distribution installs one import name, crankbeat, and lists every package of the tree."""

from __future__ import annotations

import tomllib
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
FOLDERS = {"crankbeat": "crankbeat", "logger": "crankbeat.logger", "dsp": "crankbeat.dsp"}


def _packages_in_tree() -> set[str]:
    names = set()
    for folder, prefix in FOLDERS.items():
        for init in (ROOT / folder).rglob("__init__.py"):
            rel = init.parent.relative_to(ROOT / folder).parts
            names.add(".".join((prefix, *rel)))
    return names


def test_every_package_folder_is_listed_in_pyproject() -> None:
    config = tomllib.loads((ROOT / "pyproject.toml").read_text(encoding="utf-8"))
    listed = set(config["tool"]["setuptools"]["packages"])
    assert _packages_in_tree() <= listed  # plus data-only folders such as presets.layouts


def test_installed_names_resolve_to_the_source_folders() -> None:
    import crankbeat.dsp
    import crankbeat.logger

    assert Path(crankbeat.dsp.__file__).parent == ROOT / "dsp"
    assert Path(crankbeat.logger.__file__).parent == ROOT / "logger"


def test_errors_live_outside_dsp() -> None:
    from crankbeat import errors

    assert Path(errors.__file__).parent == ROOT / "crankbeat"
    assert not (ROOT / "dsp" / "errors.py").exists()


def test_every_exception_class_is_defined_in_the_errors_module() -> None:
    # one hierarchy in one place: a class deriving from an error, exception or warning type
    # anywhere else in dsp/ or logger/ is a second hierarchy growing
    import ast
    import re

    stray = []
    for folder in ("dsp", "logger"):
        for path in sorted((ROOT / folder).rglob("*.py")):
            for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"))):
                if not isinstance(node, ast.ClassDef):
                    continue
                bases = [b.id if isinstance(b, ast.Name) else getattr(b, "attr", "")
                         for b in node.bases]
                if any(re.search(r"(Error|Exception|Warning)$", b) for b in bases):
                    stray.append(f"{path.relative_to(ROOT)}: {node.name}")
    assert stray == []
