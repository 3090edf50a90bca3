"""docs/errors.md lists every error class with its docstring's first line and its hint, and every
status hint: this test keeps the page and jobdesk/errors.py from drifting apart."""

import inspect
import re
from pathlib import Path

import jobdesk
from jobdesk import errors

DOC = Path(__file__).resolve().parents[1] / "docs" / "errors.md"


def _rows() -> dict[str, list[str]]:
    rows = {}
    for line in DOC.read_text(encoding="utf-8").splitlines():
        if line.startswith("| ") and not line.startswith("|---"):
            cells = [c.strip() for c in line.strip().strip("|").split(" | ")]
            rows[cells[0].strip("`")] = cells[1:]
    return rows


def _classes():
    return {name: cls for name, cls in vars(errors).items()
            if inspect.isclass(cls) and issubclass(cls, errors.JobdeskError)}


def test_every_error_class_is_in_the_table_with_its_words():
    rows = _rows()
    for name, cls in _classes().items():
        assert name in rows, f"{name} is missing from docs/errors.md"
        base, when, hint = rows[name]
        assert base == f"`{cls.__bases__[0].__name__}`", name
        assert when == inspect.getdoc(cls).splitlines()[0], name
        assert hint == (cls.hint or "—"), name


def test_the_table_names_no_class_the_code_lacks():
    classes = _classes()
    named = [k for k in _rows() if re.fullmatch(r"[A-Z][A-Za-z]+", k) and k not in
             ("class", "status")]
    assert set(named) <= set(classes), set(named) - set(classes)


def test_every_status_hint_is_documented():
    rows = _rows()
    for status, hint in errors.STATUS_HINTS.items():
        assert rows.get(status) == [hint], status


def test_user_errors_say_what_to_do():
    # Every class a user meets has a hint; only bases (classes other errors derive from, such
    # as JobdeskError and ServiceError) may leave it to their subclasses.
    for name, cls in _classes().items():
        if not cls.__subclasses__():
            assert cls.hint.strip(), name


def test_job_not_found_is_exported_and_still_a_key_error():
    assert issubclass(jobdesk.JobNotFound, KeyError)
    assert issubclass(jobdesk.JobNotFound, jobdesk.JobdeskError)
    err = jobdesk.JobNotFound("abc123")
    assert str(err).startswith("no job 'abc123'") and "jobdesk list" in str(err)
