"""The package layout follows the data flow: no import runs back up, every package ships.

The order of the components below is that of the layout table in DEVELOPERS.md (the
testbed, listed last there, uses only io and constants): a module may import from its own
component and from components earlier in the list, never from a later one, and never a
name defined in ``cvdesign/__init__.py``.
"""

import ast
from pathlib import Path

import pytest

import cvdesign

PACKAGE = Path(cvdesign.__file__).resolve().parent
ROOT = PACKAGE.parent

ORDER = ["_version", "errors", "constants", "progress", "kinds", "io", "testbed", "geometry",
         "stats", "pool", "score", "fit", "search", "parallel", "passes", "bias", "export",
         "spec", "pipeline", "report", "cli", "__main__"]
LAYERS = {name: rank for rank, name in enumerate(ORDER)}


def _modules():
    for path in sorted(PACKAGE.rglob("*.py")):
        parts = path.relative_to(PACKAGE).with_suffix("").parts
        if parts == ("__init__",):
            continue  # the public surface re-exports every layer
        yield path, parts


def _imports(path, parts):
    """(line, absolute target module, imported names) of every import in the file,
    including those inside functions."""
    package = ["cvdesign", *parts[:-1]]
    for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"))):
        if isinstance(node, ast.ImportFrom):
            if node.level:
                base = package[: len(package) - (node.level - 1)]
                target = ".".join(base + ([node.module] if node.module else []))
            else:
                target = node.module or ""
            yield node.lineno, target, [a.name for a in node.names]
        elif isinstance(node, ast.Import):
            for alias in node.names:
                yield node.lineno, alias.name, []


def _component(module):
    """'stats' for 'cvdesign.stats.moments'; None outside cvdesign."""
    parts = module.split(".")
    if parts[0] != "cvdesign":
        return None
    return parts[1] if len(parts) > 1 else ""


def test_every_module_has_a_layer():
    missing = {parts[0] for _, parts in _modules()} - set(LAYERS)
    assert not missing, f"add {sorted(missing)} to LAYERS in {__file__}"


def test_no_import_runs_back_up_the_data_flow():
    upward = []
    for path, parts in _modules():
        own = LAYERS[parts[0]]
        for line, target, names in _imports(path, parts):
            component = _component(target)
            if component is None:
                continue
            if component == "":
                # 'from .. import x' must name a module or subpackage, never a
                # name defined in cvdesign/__init__.py (that would import everything)
                for name in names:
                    if not ((PACKAGE / name).is_dir() or (PACKAGE / f"{name}.py").exists()):
                        upward.append(f"{path.relative_to(ROOT)}:{line} imports {name} from cvdesign")
                    elif name != parts[0] and LAYERS[name] > own:
                        upward.append(f"{path.relative_to(ROOT)}:{line} imports cvdesign.{name}")
            elif component != parts[0] and LAYERS[component] > own:
                upward.append(f"{path.relative_to(ROOT)}:{line} imports {target}")
    assert not upward, "imports that run back up:\n" + "\n".join(upward)


def test_the_layer_check_sees_an_upward_import(tmp_path):
    # the check itself: a low module that imports the pipeline is caught
    fake = tmp_path / "fake.py"
    fake.write_text("def f():\n    from ..pipeline.suggest import suggest\n")
    found = [t for _, t, _ in _imports(fake, ("geometry", "fake"))]
    assert found == ["cvdesign.pipeline.suggest"]
    assert LAYERS[_component(found[0])] > LAYERS["geometry"]


def test_pyproject_lists_every_package_and_reads_the_version_from_one_place():
    tomllib = pytest.importorskip("tomllib")  # Python >= 3.11
    config = tomllib.loads((ROOT / "pyproject.toml").read_text(encoding="utf-8"))
    listed = set(config["tool"]["setuptools"]["packages"])
    found = {".".join(("cvdesign",) + p.parent.relative_to(PACKAGE).parts).rstrip(".")
             for p in PACKAGE.rglob("__init__.py")}
    assert found - listed == set()
    assert "version" not in config["project"] and "version" in config["project"]["dynamic"]
    assert config["tool"]["setuptools"]["dynamic"]["version"] == {
        "attr": "cvdesign._version.__version__"}
    entry = config["project"]["scripts"]["cvdesign"]
    module, func = entry.split(":")
    assert callable(getattr(__import__(module, fromlist=[func]), func))


def test_every_public_name_is_importable_from_cvdesign():
    assert [name for name in cvdesign.__all__ if not hasattr(cvdesign, name)] == []


def test_no_package_name_hides_one_of_its_modules():
    # A package that re-exports a function named like one of its modules makes
    # ``import cvdesign.pkg.name`` (and monkeypatching that module) return the function.
    import importlib

    hidden = []
    for init in PACKAGE.rglob("__init__.py"):
        package = ".".join(("cvdesign",) + init.parent.relative_to(PACKAGE).parts)
        mod = importlib.import_module(package)
        for path in init.parent.glob("*.py"):
            name = path.stem
            if name.startswith("__"):
                continue
            value = getattr(mod, name, None)
            if value is not None and not hasattr(value, "__path__") \
                    and getattr(value, "__name__", None) != f"{package}.{name}":
                hidden.append(f"{package}.{name}")
    assert not hidden, hidden
