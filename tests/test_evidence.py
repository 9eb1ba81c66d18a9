"""The evidence rules of DEVELOPERS.md ("Evidence"), checked on the test and benchmark sources.

Read with ``ast`` and ``tokenize`` (not by searching text), so a rule is not fooled by
layout, aliases or comments that merely mention a word:

1. every test function checks something: an ``assert`` whose test is not a constant,
   ``pytest.raises`` / ``pytest.warns``, or a call of a function whose name starts with
   ``assert_`` or ``check_`` (``np.testing.assert_array_equal``, a module's own
   ``assert_matches_scipy``, ``_check_no_false_record``...);
2. every ``from_xml`` call (ome_types) says ``validate=`` explicitly, ``True`` unless
   it is a deliberate ``validate=False`` (the control showing what parsing alone accepts):
   without it ome_types parses but does not validate against the OME schema;
3. a comment or docstring in tests/ or benchmarks/ that cites a file of the repository
   (``docs/...``, ``qc/...``, ``example_stack/...``, ``benchmarks/...``, ``tests/...``,
   ``plugin/...``, or a Markdown file by name) cites one that exists.

Each rule is first shown to fail on a planted bad source, so the checks can fail.
"""

from __future__ import annotations

import ast
import io
import re
import subprocess
import tokenize
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]
TEST_FILES = sorted((ROOT / "tests").glob("test_*.py"))
SOURCE_FILES = sorted((ROOT / "tests").glob("*.py")) + sorted((ROOT / "benchmarks").glob("*.py"))

CHECK_NAME = re.compile(r"^_*(assert|check)_")
#: a path inside the repository: one of its top folders, then at least one more part
REPO_PATH = re.compile(r"(?<![\w./-])((?:docs|qc|plugin|tests|benchmarks|example_stack)/[\w.*/-]*)")
#: a Markdown document cited by its name alone
MARKDOWN = re.compile(r"(?<![\w/.-])([\w-]+\.md)\b")


# --------------------------------------------------------------------------- the rules


def _call_name(call: ast.Call) -> str:
    func = call.func
    if isinstance(func, ast.Attribute):
        return func.attr
    if isinstance(func, ast.Name):
        return func.id
    return ""


def _is_pytest_check(call: ast.Call) -> bool:
    func = call.func
    return (isinstance(func, ast.Attribute) and func.attr in ("raises", "warns")
            and isinstance(func.value, ast.Name) and func.value.id == "pytest")


def count_checks(function: ast.AST) -> int:
    """Assertions in a function: non-constant asserts, pytest.raises/warns, assert_/check_ calls."""
    n = 0
    for node in ast.walk(function):
        if isinstance(node, ast.Assert) and not isinstance(node.test, ast.Constant):
            n += 1
        elif isinstance(node, ast.Call) and (_is_pytest_check(node)
                                             or CHECK_NAME.match(_call_name(node))):
            n += 1
    return n


def unchecked_tests(source: str) -> list[str]:
    """Names of the test functions (module level or in a Test class) that check nothing."""
    tree = ast.parse(source)
    functions = []
    for node in tree.body:
        if isinstance(node, ast.ClassDef) and node.name.startswith("Test"):
            functions += [f for f in node.body if isinstance(f, ast.FunctionDef | ast.AsyncFunctionDef)]
        elif isinstance(node, ast.FunctionDef | ast.AsyncFunctionDef):
            functions.append(node)
    return [f.name for f in functions if f.name.startswith("test") and count_checks(f) == 0]


def from_xml_without_validation(source: str) -> list[int]:
    """Lines of ``from_xml(...)`` calls with no explicit ``validate=True``/``validate=False``."""
    bad = []
    for node in ast.walk(ast.parse(source)):
        if isinstance(node, ast.Call) and _call_name(node) == "from_xml":
            given = [k.value for k in node.keywords if k.arg == "validate"]
            if not (given and isinstance(given[0], ast.Constant) and isinstance(given[0].value, bool)):
                bad.append(node.lineno)
    return bad


def _docstrings(tree: ast.AST):
    for node in ast.walk(tree):
        if isinstance(node, ast.Module | ast.ClassDef | ast.FunctionDef | ast.AsyncFunctionDef):
            text = ast.get_docstring(node, clean=False)
            if text:
                yield node.body[0].lineno, text


def prose(source: str) -> list[tuple[int, str]]:
    """(line, text) of every comment and docstring of a Python source."""
    found = [(tok.start[0], tok.string) for tok in tokenize.generate_tokens(io.StringIO(source).readline)
             if tok.type == tokenize.COMMENT]
    return found + list(_docstrings(ast.parse(source)))


def _repo_files() -> set[str]:
    listed = subprocess.run(["git", "ls-files", "--cached", "--others", "--exclude-standard"],
                            cwd=ROOT, capture_output=True, text=True, check=False).stdout.split()
    if not listed:  # not a git checkout: every file under the root
        listed = [str(p.relative_to(ROOT)) for p in ROOT.rglob("*") if p.is_file()]
    return set(listed)


def _exists(cited: str, files: set[str]) -> bool:
    cited = cited.rstrip(".,:;)'\"`")
    if "*" in cited:
        return any(Path(f).match(cited) for f in files)
    cited = cited.rstrip("/")
    return cited in files or any(f.startswith(cited + "/") for f in files)


def missing_citations(source: str, files: set[str]) -> list[tuple[int, str]]:
    """(line, path) of every repository file cited in a comment or docstring that is absent."""
    names = {Path(f).name for f in files}
    bad = []
    for line, text in prose(source):
        for cited in REPO_PATH.findall(text):
            if not _exists(cited, files):
                bad.append((line, cited))
        for name in MARKDOWN.findall(text):
            if name not in names:
                bad.append((line, name))
    return bad


# --------------------------------------------------------------------------- the rules can fail

PLANTED = '''
"""Compare with docs/NOT_THERE.md and METHODS.md."""
import ome_types, pytest
import numpy as np

def test_nothing():
    x = 1 + 1

def test_constant_assert():
    assert True

def test_real():
    assert 1 + 1 == 2

def test_raises():
    with pytest.raises(ValueError):
        int("x")

def test_helper():
    np.testing.assert_array_equal([1], [1])  # see example_stack/generate.py

def test_parse_only(xml):
    # from qc/does_not_exist.py
    ome = ome_types.from_xml(xml)
    ome2 = ome_types.from_xml(xml, validate=True)
    assert ome == ome2
'''


def test_rules_fail_on_planted_mistakes():
    files = _repo_files()
    assert unchecked_tests(PLANTED) == ["test_nothing", "test_constant_assert"]
    assert from_xml_without_validation(PLANTED) == [24]
    cited = [c for _, c in missing_citations(PLANTED, files)]
    assert sorted(cited) == ["METHODS.md", "docs/NOT_THERE.md", "qc/does_not_exist.py"]
    assert "example_stack/generate.py" in files  # the real citation passed


# --------------------------------------------------------------------------- the rules hold


@pytest.mark.parametrize("path", TEST_FILES, ids=lambda p: p.name)
def test_every_test_checks_something(path):
    assert unchecked_tests(path.read_text(encoding="utf-8")) == []


@pytest.mark.parametrize("path", TEST_FILES, ids=lambda p: p.name)
def test_ome_xml_is_validated_against_the_schema(path):
    assert from_xml_without_validation(path.read_text(encoding="utf-8")) == []


@pytest.mark.parametrize("path", SOURCE_FILES, ids=lambda p: f"{p.parent.name}/{p.name}")
def test_cited_repository_files_exist(path):
    assert missing_citations(path.read_text(encoding="utf-8"), _repo_files()) == []
