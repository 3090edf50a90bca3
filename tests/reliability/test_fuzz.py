"""Bad input, fuzzed: arbitrary ADQL text, hostile or broken service answers, bad URLs and bad
upload tables. Each is refused with a typed error (``jobdesk.errors``) and leaves nothing in the
index or store beyond the record of the failed job.

Hostile answers come from a small real HTTP server in this module that speaks just enough
UWS to impersonate a TAP service, with one part of the conversation replaced by the case's bytes.
"""

from __future__ import annotations

import contextlib
import re
import tempfile
import threading
from http.server import BaseHTTPRequestHandler, ThreadingHTTPServer
from pathlib import Path

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

import jobdesk.desk as desk_module
from jobdesk import Desk, phases
from jobdesk.errors import (
    JobdeskError, ServiceRefused, ServiceUnreachable, StorageFull, UploadInvalid,
)
from jobdesk.keys import FUNCTION_NAMES, GRAMMAR_KEYWORDS, canonical_adql, query_key
from jobdesk.localtap import serve
from reliability_support import FULL, check_consistent

EXAMPLES = 300 if FULL else 40
SUBMIT_EXAMPLES = 200 if FULL else 15
SERVICE = "http://127.0.0.1:8787/tap"


def key(adql: str, **kw) -> str:
    return query_key(SERVICE, adql, maxrec=kw.get("maxrec"), fmt="votable")


# --- the cache key on arbitrary text ------------------------------------------------------------


@settings(max_examples=EXAMPLES * 5, deadline=None)
@given(st.text())
def test_key_of_any_text_never_fails_and_is_stable(figures, text):
    with figures.case("fuzz", "key of arbitrary text"):
        first = key(text)
        assert re.fullmatch(r"[0-9a-f]{64}", first)
        assert key(text) == first
        if canonical_adql(text).parsed:
            # Separators around a whole query never matter (ADQL 2.1 §2.1.9) ...
            assert key("  " + text + "\n") == first


# Structured queries: the same query spelled differently must share a key; a change of a literal,
# of an identifier's spelling or of a number as written must not (docs/architecture.md, keys).
KEYWORDS = ["SELECT", "FROM", "WHERE", "AND", "ORDER", "BY", "TOP"]
# Regular identifiers only: no word the key function treats as ADQL's own (those fold case).
RESERVED = {w.upper() for w in GRAMMAR_KEYWORDS | FUNCTION_NAMES | set(KEYWORDS)} | {
    "ALL", "ANY", "SOME", "TRUE", "FALSE", "FIRST", "LAST", "NULLS", "ESCAPE", "VALUES", "INTO"}
identifiers = st.from_regex(r"[a-z][a-z0-9_]{0,7}", fullmatch=True).filter(
    lambda s: s.upper() not in RESERVED)
literals = st.text(alphabet=st.characters(blacklist_categories=("Cs",)), max_size=12)
numbers = st.sampled_from(["1", "1.0", "1E0", "10", "0.5", "2.50", "-3"])


@st.composite
def queries(draw):
    cols = draw(st.lists(identifiers, min_size=1, max_size=4, unique=True))
    table = draw(identifiers)
    col = draw(st.sampled_from(cols))
    literal = draw(literals)
    number = draw(numbers)
    top = draw(st.integers(1, 1000))
    return cols, table, col, literal, number, top


def render(parts, *, case_of, gap, comment):
    cols, table, col, literal, number, top = parts
    kw = {w: case_of(w) for w in KEYWORDS}
    quoted = "'" + literal.replace("'", "''") + "'"
    tokens = [kw["SELECT"], kw["TOP"], str(top), ", ".join(cols), kw["FROM"], f"s.{table}",
              kw["WHERE"], col, "=", quoted, kw["AND"], col, ">", number,
              kw["ORDER"], kw["BY"], col]
    out = ""
    for i, token in enumerate(tokens):
        out += token + (gap if i % 3 else comment + "\n")
    return out


@settings(max_examples=EXAMPLES * 2, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(queries(), st.sampled_from([str.upper, str.lower, str.title]),
       st.sampled_from([" ", "  ", "\t", "\n ", " \r\n"]),
       st.sampled_from(["", " -- a note", "--", " -- SELECT 'x'"]), st.data())
def test_keys_share_across_spelling_and_split_on_meaning(figures, parts, case_of, gap, comment,
                                                        data):
    with figures.case("fuzz", "key invariance and separation"):
        plain = render(parts, case_of=str.upper, gap=" ", comment="")
        styled = render(parts, case_of=case_of, gap=gap, comment=comment)
        assert key(styled) == key(plain), (plain, styled)
        cols, table, col, literal, number, top = parts
        other_literal = data.draw(literals.filter(lambda s: s != literal))
        assert key(render((cols, table, col, other_literal, number, top), case_of=str.upper,
                          gap=" ", comment="")) != key(plain)
        other_number = {"1": "1.0", "1.0": "1", "1E0": "1", "10": "10.0", "0.5": ".5",
                        "2.50": "2.5", "-3": "-3.0"}[number]
        assert key(render((cols, table, col, literal, other_number, top), case_of=str.upper,
                          gap=" ", comment="")) != key(plain)
        shouted = [c.upper() for c in cols]
        assert key(render((shouted, table, col.upper(), literal, number, top),
                          case_of=str.upper, gap=" ", comment="")) != key(plain)


# --- arbitrary ADQL submitted to the embedded service --------------------------------------------


@pytest.fixture(scope="module")
def tap(tmp_path_factory):
    with serve(state=tmp_path_factory.mktemp("tap"), rows=500) as service:
        yield service


adql_like = st.one_of(
    st.text(max_size=200),
    st.builds(lambda a, b: f"SELECT {a} FROM orrery.sources {b}",
              st.text(max_size=40), st.text(max_size=40)),
    st.sampled_from(["", " ", "SELECT", "SELECT * FROM", "SELECT 'unterminated FROM x",
                     "SELECT \"x FROM y", "SELECT * FROM orrery.sources WHERE",
                     "DROP TABLE orrery.sources", "SELECT 1; SELECT 2", "\x00", "--",
                     "SELECT TOP -1 * FROM orrery.sources", "SELECT TOP 99999999999999999999 "
                     "orrery_id FROM orrery.sources", "SELECT * FROM TAP_UPLOAD.nothing"]),
)


@settings(max_examples=SUBMIT_EXAMPLES, deadline=None,
          suppress_health_check=[HealthCheck.too_slow, HealthCheck.function_scoped_fixture])
@given(adql_like)
def test_submit_of_any_text_is_a_result_or_a_typed_error(tap, figures, monkeypatch, text):
    with figures.case("fuzz", "submit arbitrary ADQL"), \
            tempfile.TemporaryDirectory() as tmp:
        desk = Desk(Path(tmp) / "d", attempts=2, wait_window=1)
        try:
            job = desk.submit(tap.url, text)
        except JobdeskError:
            job = None
        if job is not None:
            assert desk.submit(tap.url, text).id == job.id, "the same text, the same job"
            try:
                job.wait(timeout=60, progress=False)
                assert job.rows == len(job.table())
            except JobdeskError as exc:
                assert str(exc).strip()
                assert job.phase in (phases.ERROR, phases.COMPLETED), job.phase
        check_consistent(Path(tmp) / "d")
        assert desk.count() <= 1


# --- a hostile service ----------------------------------------------------------------------------

JOB_DOC = """<?xml version="1.0" encoding="UTF-8"?>
<uws:job xmlns:uws="http://www.ivoa.net/xml/UWS/v1.0" xmlns:xlink="http://www.w3.org/1999/xlink"
 version="1.1"><uws:jobId>j1</uws:jobId><uws:runId>{run}</uws:runId><uws:phase>{phase}</uws:phase>
<uws:creationTime>2030-01-01T00:00:00Z</uws:creationTime>
<uws:parameters><uws:parameter id="QUERY">SELECT 1</uws:parameter></uws:parameters>
<uws:results><uws:result id="result" xlink:href="{href}"/></uws:results></uws:job>"""

VOTABLE = """<?xml version="1.0" encoding="UTF-8"?>
<VOTABLE version="1.4" xmlns="http://www.ivoa.net/xml/VOTable/v1.3">
<RESOURCE type="results"><INFO name="QUERY_STATUS" value="OK"/>
<TABLE><FIELD name="x" datatype="int"/><DATA><TABLEDATA>
<TR><TD>1</TD></TR><TR><TD>2</TD></TR><TR><TD>3</TD></TR>
</TABLEDATA></DATA></TABLE></RESOURCE></VOTABLE>"""

SECRET_FILE_MARK = "file-content-that-must-never-travel-7f3a"
BOMB = ('<?xml version="1.0"?><!DOCTYPE lolz [<!ENTITY lol "lol">'
        + "".join(f'<!ENTITY lol{i} "{("&lol" + (str(i - 1) if i > 1 else "") + ";") * 10}">'
                  for i in range(1, 10))
        + ']>')


def external(path: str) -> str:
    return f'<?xml version="1.0"?><!DOCTYPE x [<!ENTITY ext SYSTEM "file://{path}">]>'


class HostileTap:
    """A UWS impersonator: a normal job conversation except where ``answers`` says otherwise.

    ``answers`` maps a step (``create``, ``job``, ``phase``, ``result``) to
    ``(status, headers, body)``; a body may be a callable of the run id.
    """

    def __init__(self):
        self.answers: dict[str, tuple[int, dict, bytes]] = {}
        self.run_id = "none"
        self.phase = "COMPLETED"
        hostile = self

        class Handler(BaseHTTPRequestHandler):
            protocol_version = "HTTP/1.1"

            def log_message(self, *args):
                pass

            def do_GET(self):
                if re.search(r"/async/j1/results/result", self.path):
                    hostile.reply(self, "result", 200, {"Content-Type": "application/x-votable+xml"},
                                  VOTABLE.encode())
                elif re.search(r"/async/j1/error", self.path):
                    hostile.reply(self, "error", 404, {"Content-Type": "text/plain"}, b"none")
                elif re.search(r"/async/j1", self.path):
                    hostile.reply(self, "job", 200, {"Content-Type": "text/xml"},
                                  hostile.job_doc())
                elif re.search(r"/async(\?|$)", self.path):
                    hostile.reply(self, "list", 200, {"Content-Type": "text/xml"},
                                  b'<uws:jobs xmlns:uws="http://www.ivoa.net/xml/UWS/v1.0"/>')
                else:
                    hostile.reply(self, "other", 404, {"Content-Type": "text/plain"}, b"no")

            def do_POST(self):
                length = int(self.headers.get("Content-Length") or 0)
                body = self.rfile.read(length).decode("latin-1")
                found = re.search(r"RUNID=([\w-]+)", body)
                if found:
                    hostile.run_id = found.group(1)
                if self.path.endswith("/phase"):
                    hostile.reply(self, "phase", 303, {"Location": hostile.url + "/async/j1"}, b"")
                else:
                    hostile.reply(self, "create", 303, {"Location": hostile.url + "/async/j1"},
                                  b"")

        self.server = ThreadingHTTPServer(("127.0.0.1", 0), Handler)
        self.server.daemon_threads = True
        self.url = f"http://127.0.0.1:{self.server.server_address[1]}/tap"
        threading.Thread(target=self.server.serve_forever, daemon=True).start()

    def job_doc(self) -> bytes:
        return JOB_DOC.format(run=self.run_id, phase=self.phase,
                              href=self.url + "/async/j1/results/result").encode()

    def reply(self, h, step, status, headers, body):
        if step in self.answers:
            status, headers, body = self.answers[step]
        if callable(body):
            body = body(self)
        h.send_response(status)
        for name, value in headers.items():
            h.send_header(name, value)
        h.send_header("Content-Length", str(len(body)))
        h.send_header("Connection", "close")
        h.end_headers()
        with contextlib.suppress(OSError):
            h.wfile.write(body)
        h.close_connection = True

    def close(self):
        self.server.shutdown()
        self.server.server_close()


@pytest.fixture(scope="module")
def hostile():
    server = HostileTap()
    yield server
    server.close()


def xml(body: str) -> tuple[int, dict, bytes]:
    return 200, {"Content-Type": "text/xml"}, body.encode()


def job_with(**kw):
    def build(h: HostileTap) -> bytes:
        values = {"run": h.run_id, "phase": "COMPLETED",
                  "href": h.url + "/async/j1/results/result"} | kw
        return JOB_DOC.format(**values).encode()
    return 200, {"Content-Type": "text/xml"}, build


HOSTILE = {
    # the job document
    "job: not XML": {"job": (200, {"Content-Type": "text/xml"}, b"hello, this is not XML")},
    "job: empty": {"job": (200, {"Content-Type": "text/xml"}, b"")},
    "job: HTML page (200)": {"job": (200, {"Content-Type": "text/html"},
                                     b"<html><body><h1>Sign in</h1><form></form></body></html>")},
    "job: HTML page (500)": {"job": (500, {"Content-Type": "text/html"},
                                     b"<html><body><h1>Internal error</h1></body></html>")},
    "job: truncated": {"job": (200, {"Content-Type": "text/xml"},
                               lambda h: h.job_doc()[:180])},
    "job: wrong root": {"job": xml('<VOTABLE version="1.4"/>')},
    "job: no phase": {"job": xml('<uws:job xmlns:uws="http://www.ivoa.net/xml/UWS/v1.0">'
                                 '<uws:jobId>j1</uws:jobId></uws:job>')},
    "job: unknown phase": {"job": job_with(phase="EXPLODED")},
    "job: entity expansion": {"job": xml(BOMB + '<job><phase>&lol9;</phase></job>')},
    "job: external entity": {"job": xml(external("/etc/hostname")
                                        + "<job><phase>&ext;</phase></job>")},
    "job: huge header": {"job": (200, {"Content-Type": "text/xml", "X-Pad": "p" * 200_000},
                                 lambda h: h.job_doc())},
    "job: result href file://": {"job": job_with(href="file:///etc/passwd")},
    "job: result href elsewhere, closed port": {"job": job_with(href="http://127.0.0.1:9/r")},
    # creating the job
    "create: 200 with HTML": {"create": (200, {"Content-Type": "text/html"},
                                         b"<html>welcome</html>")},
    "create: 303 without Location": {"create": (303, {}, b"")},
    "create: Location file://": {"create": (303, {"Location": "file:///etc/passwd"}, b"")},
    "create: Location javascript:": {"create": (303, {"Location": "javascript:alert(1)"}, b"")},
    "create: 400 with HTML": {"create": (400, {"Content-Type": "text/html"},
                                         b"<html><b>bad</b> request</html>")},
    # the result
    "result: not XML": {"result": (200, {"Content-Type": "application/x-votable+xml"},
                                   b"col1,col2\n1,2\n")},
    "result: HTML page": {"result": (200, {"Content-Type": "text/html"},
                                     b"<!DOCTYPE html><html><body>quota exceeded</body></html>")},
    "result: truncated VOTable (1/2)": {"result": (200, {"Content-Type": "text/xml"},
                                                   VOTABLE[: len(VOTABLE) // 2].encode())},
    "result: truncated VOTable (before </VOTABLE>)": {
        "result": (200, {"Content-Type": "text/xml"}, VOTABLE[:-12].encode())},
    "result: empty": {"result": (200, {"Content-Type": "text/xml"}, b"")},
    "result: entity expansion": {"result": xml(BOMB + VOTABLE.split("?>", 1)[1]
                                               .replace("<TD>1</TD>", "<TD>&lol9;</TD>"))},
    "result: external entity": {"result": xml(external("/etc/hostname")
                                              + VOTABLE.split("?>", 1)[1]
                                              .replace("<TD>1</TD>", "<TD>&ext;</TD>"))},
    "result: unknown datatype": {"result": xml(VOTABLE.replace('datatype="int"',
                                                               'datatype="quaternion"'))},
    "result: ragged rows": {"result": xml(VOTABLE.replace("<TR><TD>2</TD></TR>",
                                                          "<TR><TD>2</TD><TD>9</TD></TR>"))},
    "result: bad number": {"result": xml(VOTABLE.replace("<TD>2</TD>", "<TD>two</TD>"))},
    "result: error document": {"result": xml(VOTABLE.replace('value="OK"', 'value="ERROR"'))},
    "result: 500 forever": {"result": (500, {"Content-Type": "text/plain"}, b"broken")},
    # a wrong content type on a good VOTable may be accepted: the bytes decide
    "result: VOTable as text/plain": {"result": (200, {"Content-Type": "text/plain"},
                                                 VOTABLE.encode())},
}
MAY_SUCCEED = {"result: VOTable as text/plain"}


@pytest.mark.parametrize("case", list(HOSTILE))
def test_hostile_answers_are_refused_with_a_typed_error(hostile, tmp_path, figures, monkeypatch,
                                                        case):
    monkeypatch.setattr(desk_module, "UNREACHABLE_SLICES", 1)
    hostile.answers = HOSTILE[case]
    root = tmp_path / "d"
    with figures.case("fuzz", f"hostile service: {case}"):
        desk = Desk(root, attempts=2, timeout=3, wait_window=1)
        error = None
        try:
            job = desk.submit(hostile.url, f"SELECT x FROM t -- {case}")
            job.wait(timeout=20, progress=False)
            assert list(job.table()["x"]) == [1, 2, 3]
        except JobdeskError as exc:
            error = exc
        if case in MAY_SUCCEED and error is None:
            pass
        else:
            assert error is not None, "a hostile answer was accepted"
            assert type(error).__name__ != "WaitTimeout", f"not refused, only timed out: {error}"
            assert error.message.strip() and error.hint.strip()
            text = str(error)
            assert "root:" not in text and SECRET_FILE_MARK not in text
            assert len(text) < 2000, "the message stays readable"
        counts = check_consistent(root)
        assert counts["records"] <= 1
        if error is not None:
            assert counts["objects"] == 0, "nothing of a refused answer is kept"
            for record in desk.jobs(limit=None):
                assert not record.record.get("result_sha256")
                if _transient(error):
                    continue  # the record waits for the service, to fetch again later
                assert record.phase in phases.ACTIVE | {phases.ERROR}, record.phase


def _transient(error: JobdeskError) -> bool:
    """Errors after which jobdesk keeps a job to try again (no answer, 429/5xx, disk full)."""
    status = getattr(error, "status", None)
    return isinstance(error, (ServiceUnreachable, StorageFull)) or (
        isinstance(error, ServiceRefused) and status is not None and (status == 429 or status >= 500))


@settings(max_examples=EXAMPLES, deadline=None,
          suppress_health_check=[HealthCheck.too_slow, HealthCheck.function_scoped_fixture])
@given(step=st.sampled_from(["job", "result"]),
       body=st.one_of(st.binary(max_size=400),
                      st.text(max_size=300).map(lambda t: t.encode("utf-8", "replace")),
                      st.builds(lambda n: VOTABLE.encode()[:n], st.integers(0, len(VOTABLE))),
                      st.builds(lambda n: JOB_DOC.encode()[:n], st.integers(0, len(JOB_DOC)))))
def test_random_bytes_from_the_service_are_refused(hostile, figures, monkeypatch, step, body):
    monkeypatch.setattr(desk_module, "UNREACHABLE_SLICES", 1)
    hostile.answers = {step: (200, {"Content-Type": "text/xml"}, body)}
    with figures.case("fuzz", f"random bytes as the {step}"), \
            tempfile.TemporaryDirectory() as tmp:
        root = Path(tmp) / "d"
        desk = Desk(root, attempts=1, timeout=3, wait_window=1)
        try:
            desk.submit(hostile.url, "SELECT x FROM t").wait(timeout=10, progress=False)
            accepted = True
        except JobdeskError as exc:
            accepted = False
            assert exc.message.strip()
        counts = check_consistent(root)
        if not accepted:
            assert counts["objects"] == 0


# --- bad URLs and bad uploads ------------------------------------------------------------------

BAD_URLS = ["", " ", "tap", "ftp://127.0.0.1/tap", "file:///etc/passwd", "http://", "http:///tap",
            "http://[::1/tap", "http://127.0.0.1:99999/tap", "javascript:alert(1)",
            "http://127.0.0.1:9/tap", "http://no-such-host.invalid/tap", "\x00http://a/tap"]


@pytest.mark.parametrize("url", BAD_URLS)
def test_bad_service_urls_are_refused(tmp_path, figures, url):
    with figures.case("fuzz", f"bad URL {url!r}"):
        desk = Desk(tmp_path / "d", attempts=1, timeout=3)
        with pytest.raises(JobdeskError) as info:
            desk.submit(url, "SELECT TOP 1 orrery_id FROM orrery.sources ORDER BY orrery_id")
        assert info.value.message.strip() and info.value.hint.strip()
        counts = check_consistent(tmp_path / "d")
        assert counts["objects"] == 0
        for job in desk.jobs(limit=None):
            assert job.phase in (phases.ERROR, phases.UNSENT)


@settings(max_examples=EXAMPLES, deadline=None)
@given(st.text(max_size=60))
def test_any_text_as_a_url_is_refused_or_unreachable(figures, url):
    with figures.case("fuzz", "arbitrary text as URL"), tempfile.TemporaryDirectory() as tmp:
        desk = Desk(Path(tmp) / "d", attempts=1, timeout=1)
        try:
            desk.submit(url, "SELECT 1")
        except JobdeskError as exc:
            assert exc.message.strip()
        check_consistent(Path(tmp) / "d")


def _bad_uploads():
    import numpy as np
    from astropy.table import Table
    import pandas as pd

    good = Table({"a": [1, 2]})
    return {
        "name with a space": {"my table": good},
        "name starting with a digit": {"1t": good},
        "name with SQL": {"t;DROP": good},
        "non-string name": {7: good},
        "missing file": {"t": "/nonexistent/path.vot"},
        "directory": {"t": "/"},
        "bytes that are not a VOTable": {"t": b"\x00\x01 not xml"},
        "HTML bytes": {"t": b"<html><body>hi</body></html>"},
        "a number": {"t": 42},
        "a dict": {"t": {"a": [1, 2]}},
        "entity expansion bytes": {"t": (BOMB + VOTABLE.split("?>", 1)[1]
                                         .replace("<TD>1</TD>", "<TD>&lol9;</TD>")).encode()},
        "table of objects": {"t": Table({"a": np.array([{"x": 1}, None], dtype=object)})},
        "frame of objects": {"t": pd.DataFrame({"a": [object(), object()]})},
    }


@pytest.mark.parametrize("case", list(_bad_uploads()))
def test_bad_upload_tables_are_refused_before_anything_is_kept(tap, tmp_path, figures, case):
    with figures.case("fuzz", f"bad upload: {case}"):
        desk = Desk(tmp_path / "d", attempts=1)
        before = tap.stats()["jobs_created"]
        with pytest.raises(UploadInvalid) as info:
            desk.submit(tap.url, "SELECT * FROM TAP_UPLOAD.t", uploads=_bad_uploads()[case])
        assert info.value.message.strip() and info.value.hint.strip()
        assert desk.count() == 0
        counts = check_consistent(tmp_path / "d")
        assert counts["objects"] == 0
        assert tap.stats()["jobs_created"] == before
