"""The package's layout: imports run one way, from later stages to earlier ones.

DEVELOPERS.md draws the stages; this test reads every module's imports (with ast, so
nothing is executed) and checks each against that order.
"""

import ast
from pathlib import Path

import pytest

SRC = Path(__file__).parents[1] / "src" / "timbrel"

#: Modules from the earliest stage to the latest; a module may import only those before it.
STAGES = ["_errors", "_atomic", "store", "_progress", "_threads", "_workers", "config", "audio",
          "frontend", "pooling", "events", "cache", "model", "windows", "pipeline", "training",
          "extractor", "export", "evaluation", "detection", "likelihood", "plots", "cli"]

#: Inside the model subpackage, the same rule, from the kernels to the estimator.
MODEL_STAGES = ["_kernels", "units", "_params", "_state", "_step", "_update", "_guard",
                "_files", "_core", "_queries", "_estimator"]


def _timbrel_imports(path: Path, package: str) -> set[str]:
    """Dotted names (below ``timbrel``) of the timbrel modules a file imports."""
    names = set()
    for node in ast.walk(ast.parse(path.read_text())):
        if isinstance(node, ast.ImportFrom):
            if node.level:  # relative: resolve against the file's package
                base = package.split(".")[: len(package.split(".")) - node.level + 1]
                module = ".".join(base + ([node.module] if node.module else []))
            else:
                module = node.module or ""
            if module.startswith("timbrel"):
                names.add(module)
                names.update(f"{module}.{a.name}" for a in node.names)
        elif isinstance(node, ast.Import):
            names.update(a.name for a in node.names if a.name.startswith("timbrel"))
    return {n.removeprefix("timbrel").lstrip(".") for n in names}


def _stage(name: str, stages: list[str]) -> int | None:
    head = name.split(".")[0]
    return stages.index(head) if head in stages else None


@pytest.mark.parametrize("module", STAGES)
def test_stage_imports_only_earlier_stages(module):
    path = SRC / f"{module}.py" if (SRC / f"{module}.py").exists() else SRC / module / "__init__.py"
    files = [path] if path.name != "__init__.py" else sorted(path.parent.glob("*.py"))
    own = STAGES.index(module)
    for file in files:
        package = "timbrel." + module if file.parent != SRC else "timbrel"
        for name in _timbrel_imports(file, package):
            stage = _stage(name, STAGES)
            if stage is None or name.startswith(module):
                continue  # the package itself, its version, or its own submodules
            assert stage < own, f"{file.name} ({module}) imports {name}, a later stage"


def test_model_submodules_import_one_way():
    for file in sorted((SRC / "model").glob("*.py")):
        if file.name == "__init__.py":
            continue
        own = MODEL_STAGES.index(file.stem)
        for name in _timbrel_imports(file, "timbrel.model"):
            if name.startswith("model."):
                stage = MODEL_STAGES.index(name.split(".")[1])
                assert stage < own, f"model/{file.name} imports {name}, a later module"
            else:  # the model is pure numpy: only the error types, the atomic writer and
                # the store's reader of a model file at a URL
                assert name.split(".")[0] in ("_errors", "_atomic", "store"), (file.name, name)


def test_nothing_reads_models_through_the_trainer():
    # (the trainer reads a model through pipeline, to stack a layer on it)
    for module in ("export", "evaluation", "likelihood", "plots", "pipeline"):
        imports = _timbrel_imports(SRC / f"{module}.py", "timbrel")
        assert not any(n.startswith("training") for n in imports), module
