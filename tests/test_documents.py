"""jobdesk.documents: the one reader of what a service sends, and the names that moved to it.

Documents here are written by hand after the standards they name (no server needed); the
service-facing behaviour is tested over HTTP in tests/test_remote.py.
"""

from __future__ import annotations

from datetime import UTC, datetime

import pytest

from jobdesk import documents, errors, remote, results
from jobdesk.errors import NotATapService, ServiceResponseInvalid


def test_the_names_callers_import_from_remote_still_work():
    from jobdesk.remote import Downloaded, JobStatus, Remote  # the remote contract
    assert JobStatus is documents.JobStatus
    assert Remote and Downloaded
    assert remote._job_status is documents.job_status


def test_one_reader_of_error_documents():
    # errors.error_document_message moved to documents (errors is below documents in the
    # layers of docs/architecture.md, so it no longer names it).
    assert results.error_message is documents.error_document_message
    assert remote._error_votable_message is documents.error_document_message
    assert not hasattr(errors, "error_document_message")


# DALI 1.1 §4.4.1: the QUERY_STATUS INFOs of the "results" RESOURCE count, the last one wins.
_OVERFLOW_AFTER_OK = (
    b'<VOTABLE xmlns="http://www.ivoa.net/xml/VOTable/v1.3">'
    b'<INFO name="QUERY_STATUS" value="ERROR">outside the results: not counted</INFO>'
    b'<RESOURCE type="results"><INFO name="QUERY_STATUS" value="OK"/>'
    b'<TABLE><FIELD name="a" datatype="int"/><DATA><TABLEDATA><TR><TD>1</TD></TR></TABLEDATA>'
    b'</DATA></TABLE><INFO name="QUERY_STATUS" value="OVERFLOW">cut at 1</INFO></RESOURCE>'
    b'</VOTABLE>')


def test_the_query_status_rule_is_the_same_for_errors_and_results(tmp_path):
    path = tmp_path / "r.vot"
    path.write_bytes(_OVERFLOW_AFTER_OK)
    summary = results.scan(path)
    assert (summary.status, summary.message) == ("OVERFLOW", "cut at 1")
    assert documents.error_document_message(_OVERFLOW_AFTER_OK) is None
    assert documents.query_status([]) == ("OK", None)
    assert documents.query_status([("meta", "ERROR", "x"), ("", "ERROR", "y")]) == ("ERROR", "y")


UWS_1_1_LIST = b"""<?xml version="1.0"?>
<uws:jobs version="1.1" xmlns:uws="http://www.ivoa.net/xml/UWS/v1.0"
          xmlns:xlink="http://www.w3.org/1999/xlink">
  <uws:jobref id="old" xlink:href="http://h/tap/async/old">
    <uws:phase>COMPLETED</uws:phase><uws:runId>r-1</uws:runId>
    <uws:creationTime>2026-01-01T10:00:00Z</uws:creationTime>
  </uws:jobref>
  <uws:jobref id="new" xlink:href="new">
    <uws:phase>EXECUTING</uws:phase>
    <uws:creationTime>2026-01-01T11:00:00Z</uws:creationTime>
  </uws:jobref>
  <uws:jobref id="bare"><uws:phase>PENDING</uws:phase></uws:jobref>
</uws:jobs>"""


def test_a_job_list_is_read_newest_first_with_links_resolved():
    refs = documents.job_list(UWS_1_1_LIST, "http://h/tap", base="http://h/tap/async/",
                              jobs_url="http://h/tap/async", limit=10)
    # Not every entry has a creationTime: the server's order, taken as newest first (UWS 1.1
    # §2.2.2.1 with LAST honoured), is kept.
    assert [r.url for r in refs] == ["http://h/tap/async/old", "http://h/tap/async/new",
                                     "http://h/tap/async/bare"]
    assert refs[0].run_id == "r-1" and refs[1].run_id is None
    assert refs[1].created == datetime(2026, 1, 1, 11, tzinfo=UTC)
    dated = documents.job_list(UWS_1_1_LIST.replace(b'<uws:jobref id="bare">', b'<x>')
                               .replace(b'<uws:phase>PENDING</uws:phase></uws:jobref>', b'</x>'),
                               "http://h/tap", base="http://h/tap/async/",
                               jobs_url="http://h/tap/async", limit=1)
    assert [r.url for r in dated] == ["http://h/tap/async/new"]   # by creationTime, newest


def test_a_web_page_is_no_document_and_a_non_list_is_refused():
    with pytest.raises(NotATapService):
        documents.job_list(b"<html><body>Sign in</body></html>", "http://h", base="http://h/",
                           jobs_url="http://h/async", limit=5)
    with pytest.raises(ServiceResponseInvalid):
        documents.job_list(b"<job/>", "http://h", base="http://h/", jobs_url="http://h/async",
                           limit=5)


def test_an_error_answer_keeps_the_services_words_and_hides_a_page():
    doc = (b'<VOTABLE><RESOURCE type="results"><INFO name="QUERY_STATUS" value="ERROR">'
           b'no  such column</INFO></RESOURCE></VOTABLE>')
    assert documents.answer_message(doc, "text/xml", "Bad Request") == ("no  such column", None)
    message, detail = documents.answer_message(b"<html><p>Proxy error</p></html>", None, "Bad")
    assert "web page" in message and detail == "Proxy error"
    assert documents.answer_message(b"", "text/plain", "Bad Request") == ("Bad Request", None)
    assert documents.document_message(b"<error><why>quota</why> exceeded</error>") == \
        "quota exceeded"
