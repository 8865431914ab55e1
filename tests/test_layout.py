"""The layout rules of DEVELOPERS.md that code can check."""
import re
import subprocess
import sys
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]


def test_core_never_imports_qt():
    pat = re.compile(r"^\s*(import|from)\s+(PySide6|PyQt\d|shiboken6|qtpy)\b", re.M)
    offenders = [str(p.relative_to(ROOT)) for p in (ROOT / "core").rglob("*.py") if pat.search(p.read_text())]
    assert offenders == []
    code = ("import sys, pkgutil, importlib, kinemark.core as c\n"
            "for m in pkgutil.walk_packages(c.__path__, 'kinemark.core.'):\n"
            "    importlib.import_module(m.name)\n"
            "print(sorted(n for n in sys.modules if n.split('.')[0] in ('PySide6', 'shiboken6')))")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True).stdout
    assert out.strip() == "[]"


def test_sql_lives_in_the_store_only():
    pat = re.compile(r"\b(SELECT\s+.+\s+FROM|INSERT\s+INTO|UPDATE\s+\w+\s+SET|DELETE\s+FROM|CREATE\s+TABLE)\b")
    allowed = {"core/store.py"}
    offenders = [str(p.relative_to(ROOT)) for p in list((ROOT / "core").rglob("*.py")) + list((ROOT / "app").rglob("*.py"))
                 if str(p.relative_to(ROOT)) not in allowed and pat.search(p.read_text())]
    assert offenders == []


def test_installed_names_are_namespaced():
    import kinemark.core
    assert kinemark.core.__name__ == "kinemark.core"
    top = subprocess.run([sys.executable, "-c", "import importlib.util as u; print(u.find_spec('core'), u.find_spec('app'))"],
                         capture_output=True, text=True, cwd="/", check=True).stdout
    assert top.strip() == "None None"
