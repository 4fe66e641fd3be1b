"""The package layout follows the data's journey: no module imports a later stage of the pipeline.

An independent reading of the source: every ``import`` statement is parsed with the standard library's ``ast``
and its target resolved to a stage, so a new upward import fails here whatever the module does at run time.
"""

import ast
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1] / "analysis"

#: the pipeline's stages, in the order the data passes them (modules at the top of ``analysis`` are stage 0)
STAGES = {"conventions": 0, "errors": 0, "runs": 0, "wording": 0, "io": 1, "tracks": 2, "models": 3, "spectral": 4,
          "simulation": 5, "fitting": 6, "regional": 7}


def _stage(parts):
    head = parts[0] if parts else ""
    if head not in STAGES:
        raise AssertionError(f"module {'.'.join(parts)} is in no stage; add it to STAGES")
    return STAGES[head]


def _imports(rel, source: str):
    """(line, target parts below ``analysis``) of each import of a driftspec.analysis module in ``source``,
    the text of the module at ``rel`` (its path parts below ``analysis``, without the suffix)."""
    package = rel[:-1]
    tree = ast.parse(source)
    for node in ast.walk(tree):
        if isinstance(node, ast.ImportFrom):
            if node.level:
                base = list(package[: len(package) - (node.level - 1)]) if node.level - 1 <= len(package) else None
                if base is None:
                    continue
                target = base + (node.module.split(".") if node.module else [])
                if not node.module:  # "from . import x": each name is a module or a name of the package
                    for alias in node.names:
                        yield node.lineno, [*target, alias.name] if target else [alias.name]
                    continue
                yield node.lineno, target
            elif node.module and node.module.startswith("driftspec.analysis."):
                yield node.lineno, node.module.split(".")[2:]
            elif node.module and node.module.startswith("driftspec.app"):
                yield node.lineno, ["app"]
        elif isinstance(node, ast.Import):
            for alias in node.names:
                if alias.name.startswith("driftspec.app"):
                    yield node.lineno, ["app"]


MODULES = sorted(p for p in ROOT.rglob("*.py") if p.name != "__init__.py" or p.parent != ROOT)


def _check(rel, source):
    own = _stage(rel)
    for line, target in _imports(rel, source):
        where = "/".join(rel)
        assert target[0] != "app", f"{where}:{line} imports the user interface"
        if target[0] not in STAGES and len(target) == 1:
            continue  # a name imported from the package's own __init__
        assert _stage(target) <= own, f"{where}:{line} imports {'.'.join(target)} from a later stage"


@pytest.mark.parametrize("path", MODULES, ids=[str(p.relative_to(ROOT)) for p in MODULES])
def test_no_import_runs_back_up_the_pipeline(path):
    _check(path.relative_to(ROOT).with_suffix("").parts, path.read_text())


def test_the_checker_sees_an_upward_import():
    # the check itself can fail: a tracks module importing fitting, or io importing tracks, is reported
    with pytest.raises(AssertionError, match="later stage"):
        _check(("tracks", "probe"), "from ..fitting import fit_series\n")
    with pytest.raises(AssertionError, match="later stage"):
        _check(("io", "probe"), "from driftspec.analysis.tracks.windows import Window\n")
    with pytest.raises(AssertionError, match="user interface"):
        _check(("fitting", "probe"), "import driftspec.app.dashboard\n")
    _check(("fitting", "probe"), "from ..spectral.likelihood import prepare_window\nfrom .core import FitResult\n")


def test_public_names_stay_importable_from_the_package():
    import driftspec.analysis as analysis

    for name in analysis.__all__:
        assert getattr(analysis, name) is not None, name
