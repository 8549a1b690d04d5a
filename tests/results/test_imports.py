"""The results folder has one owner: report/ reads it through kablate.results, never through
kablate.trials (which opens storage and runs workers). Checked on the imports themselves,
parsed with `ast`, so an import inside a function counts too."""

from __future__ import annotations

import ast
from pathlib import Path

import kablate

PACKAGE = Path(kablate.__file__).parent


def imported_modules(path: Path) -> list[tuple[int, str]]:
    """(line, module) of every import in ``path``, relative imports resolved."""
    tree = ast.parse(path.read_text(encoding="utf-8"), filename=str(path))
    package = ".".join(("kablate", *path.relative_to(PACKAGE).parent.parts))
    found = []
    for node in ast.walk(tree):
        if isinstance(node, ast.Import):
            found += [(node.lineno, alias.name) for alias in node.names]
        elif isinstance(node, ast.ImportFrom):
            base = node.module or ""
            if node.level:
                parent = package.rsplit(".", node.level - 1)[0] if node.level > 1 else package
                base = f"{parent}.{base}" if base else parent
            found += [(node.lineno, base)]
            found += [(node.lineno, f"{base}.{alias.name}") for alias in node.names]
    return found


def imports_of(package: str, forbidden: str) -> list[str]:
    """``file:line module`` for every import of ``forbidden`` (or below it) in ``package``."""
    hits = []
    for path in sorted((PACKAGE / package).rglob("*.py")):
        for line, module in imported_modules(path):
            if module == forbidden or module.startswith(forbidden + "."):
                hits.append(f"{path.relative_to(PACKAGE)}:{line} {module}")
    return hits


def test_report_does_not_import_trials():
    assert imports_of("report", "kablate.trials") == []


def test_results_imports_neither_trials_nor_report():
    # The results package sits under both: trials/ writes through it, report/ reads through it.
    assert imports_of("results", "kablate.trials") == []
    assert imports_of("results", "kablate.report") == []


def test_the_check_sees_every_kind_of_import(tmp_path, monkeypatch):
    """The parser finds a plain, a from-, a relative and a function-local import."""
    folder = tmp_path / "kablate" / "report"
    folder.mkdir(parents=True)
    (folder / "x.py").write_text(
        "import kablate.trials.store\n"
        "from kablate.trials import open_results\n"
        "from ..trials.queue import RETIRED\n"
        "def f():\n    from kablate.trials.race import race_summary\n"
    )
    monkeypatch.setattr(f"{__name__}.PACKAGE", tmp_path / "kablate")
    assert [hit.split()[1] for hit in imports_of("report", "kablate.trials")] == [
        "kablate.trials.store",
        "kablate.trials",
        "kablate.trials.open_results",
        "kablate.trials.queue",
        "kablate.trials.queue.RETIRED",
        "kablate.trials.race",
        "kablate.trials.race.race_summary",
    ]
