"""Stage names and generated column names are spelt once, in ``pipeline/compile/names.py``.

Readers of the analysis table (statistics, report, workflows) and the compiler's own passes ask
``names`` for ``incident_X`` or ``index_dates`` instead of rebuilding the pattern, so a rename
is one edit. These tests read the package's source and fail on a new spelling elsewhere.
Tests keep literal names on purpose: they check the contract.
"""

from __future__ import annotations

import ast
import re
import sys
import textwrap
from pathlib import Path

from pipeline.compile import names

PACKAGE = Path(__file__).resolve().parents[1] / "pipeline"
NAMES_MODULE = PACKAGE / "compile" / "names.py"

# The per-outcome column families of cohort.parquet and persontime.parquet.
_FAMILIES = "prevalent|at_risk|incident|onset|days_to|time|event|days_at_risk|events"
# ``f"incident_{o}"`` (or a ``str.format`` template): a column built from its family's prefix.
OUTCOME_PATTERN = re.compile(rf"(?<![A-Za-z0-9_])({_FAMILIES})_\{{")
# ``"prevalent_"`` alone: a prefix spelt again (for ``startswith`` or concatenation).
PREFIX_LITERAL = re.compile(rf"[\"']({_FAMILIES})_[\"']")


def _sources() -> list[Path]:
    return sorted(p for p in PACKAGE.rglob("*.py") if p != NAMES_MODULE)


def outcome_spellings(text: str) -> list[str]:
    """Lines of ``text`` that build an outcome column or spell a family's prefix."""
    return [
        line.strip()
        for line in text.splitlines()
        if OUTCOME_PATTERN.search(line) or PREFIX_LITERAL.search(line)
    ]


def _stage_names() -> set[str]:
    fixed = {v for k, v in vars(names).items() if k.isupper() and isinstance(v, str)}
    families = {names.USED, names.JUDGED_SUFFIX, names.LOOKBACK_SUFFIX}
    families |= {names.ONSET_PREFIX, names.RULES_PREFIX, *names.OUTCOME_PREFIXES}
    tables = ("patients", "encounters", "diagnoses", "prescriptions", "measurements")
    return (fixed - families) | {names.judged_stage(t) for t in tables}


def literal_stage_reads(text: str) -> list[str]:
    """Stage names written into SQL: after FROM/JOIN in a template, or as ``.from_("x")``."""
    stages = "|".join(sorted(_stage_names(), key=len, reverse=True))
    in_sql = re.compile(rf"\b(FROM|JOIN)\s+({stages})\b")
    at_start = re.compile(rf"^({stages})(\s+AS\s+\w+)?$")
    tree = ast.parse(text)
    docstrings = {
        id(node.body[0].value)
        for node in ast.walk(tree)
        if isinstance(node, ast.Module | ast.ClassDef | ast.FunctionDef)
        and node.body
        and isinstance(node.body[0], ast.Expr)
    }
    found = []
    for node in ast.walk(tree):
        hit = (
            in_sql.search(node.value)
            if isinstance(node, ast.Constant)
            and isinstance(node.value, str)
            and id(node) not in docstrings
            else None
        )
        if hit:
            found.append(f"line {node.lineno}: {hit.group(0)}")
        if (
            isinstance(node, ast.Call)
            and isinstance(node.func, ast.Attribute)
            and node.func.attr in ("from_", "join", "to_table")
            and node.args
            and isinstance(node.args[0], ast.Constant)
            and isinstance(node.args[0].value, str)
            and at_start.match(node.args[0].value)
        ):
            found.append(f"line {node.lineno}: {node.func.attr}({node.args[0].value!r})")
    return found


def test_outcome_columns_are_built_only_by_names():
    found = {
        str(p.relative_to(PACKAGE)): hits
        for p in _sources()
        if (hits := outcome_spellings(p.read_text(encoding="utf-8")))
    }
    assert found == {}, "use names.outcome_columns / names.*_PREFIX instead"


def test_compiler_reads_stages_by_their_names_entry():
    found = {
        str(p.relative_to(PACKAGE)): hits
        for p in sorted((PACKAGE / "compile").glob("*.py"))
        if p != NAMES_MODULE and (hits := literal_stage_reads(p.read_text(encoding="utf-8")))
    }
    assert found == {}, "read a stage through a :placeholder filled from names (DEVELOPERS.md)"


def test_the_checks_catch_what_they_are_for():
    # Each pattern the package must not contain is caught (so the two tests above can fail).
    assert outcome_spellings('col = f"incident_{outcome}"')
    assert outcome_spellings('c.startswith("prevalent_")')
    assert outcome_spellings('days = f"days_at_risk_{o}"')
    assert not outcome_spellings('risk = f"risk_{o}"; x = f"first_evidence_{c}"')
    template = textwrap.dedent('''
        _T = """
        SELECT patient_id FROM index_dates AS i JOIN contact_rows AS c ON TRUE
        """
        q = exp.select("a").from_("cohort AS c")
    ''')
    assert len(literal_stage_reads(template)) == 2
    assert not literal_stage_reads('_T = """SELECT a FROM :rows AS r"""')


def test_names_loads_without_the_compiler():
    # Statistics import names; importing it must not load sqlglot and every pass.
    import subprocess

    probe = "import sys, pipeline.compile.names; print('sqlglot' in sys.modules)"
    out = subprocess.run([sys.executable, "-c", probe], capture_output=True, text=True, check=True)
    assert out.stdout.strip() == "False"
